"""Self-contained HTML pages from the standard library: escaping, tables, embedded figures.

Every page carries its own CSS (and a few lines of script for keyboard
toggling), its figures as base64 PNG ``data:`` URIs, and the research-use
caution: it can be opened from a USB stick on a machine without internet.
"""

from __future__ import annotations

import base64
import math
from collections.abc import Iterable, Mapping, Sequence
from html import escape
from string import Template

from .. import __version__

__all__ = ["CAUTION", "Cell", "figure", "key_value_table", "number", "page", "table", "toggle"]

#: Shown on every page.
CAUTION = "For research pipelines, not diagnosis; defer to local scanner QA and licensed practice."

_CSS = """
body{font:14px/1.45 system-ui,-apple-system,"Segoe UI",sans-serif;color:#1b1f24;margin:0;background:#f6f7f9}
main{max-width:1180px;margin:0 auto;padding:12px 24px 40px}
h1{font-size:22px;margin:14px 0 4px}h2{font-size:17px;margin:26px 0 8px;border-bottom:1px solid #d5d9de}
.caution{background:#fff4d6;border:1px solid #e0b84c;padding:6px 12px;border-radius:4px;margin:10px 0}
.sub{color:#57606a}
table{border-collapse:collapse;margin:6px 0 10px;background:#fff}
th,td{border:1px solid #d5d9de;padding:3px 8px;text-align:left;vertical-align:top}
th{background:#eef1f4}td.num{text-align:right;font-variant-numeric:tabular-nums}
figure{margin:8px 0;background:#fff;border:1px solid #d5d9de;padding:6px;display:inline-block}
figure img{max-width:100%;height:auto;display:block}
figcaption{color:#57606a;font-size:12.5px;max-width:1100px}
.flag{background:#ffe1e1;color:#8a1111;border-radius:3px;padding:0 5px;margin-right:4px;white-space:nowrap}
.ok{color:#1a7f37}
.toggle>input{position:absolute;opacity:0}
.toggle>label{display:inline-block;padding:3px 12px;border:1px solid #8c959f;cursor:pointer;background:#fff;
margin-right:-1px}
.toggle>input:checked+label{background:#1f6feb;color:#fff;border-color:#1f6feb}
.toggle>input:focus-visible+label{outline:2px solid #1f6feb}
.toggle>.pane{display:none}
.toggle>input.show-a:checked~.pane.a,.toggle>input.show-b:checked~.pane.b{display:block}
footer{color:#57606a;font-size:12px;margin-top:30px}
"""

# Keyboard: "t" flips every before/after toggle on the page (the radio buttons
# work without script too).
_SCRIPT = """
document.addEventListener('keydown',function(e){if(e.key!=='t')return;
document.querySelectorAll('.toggle').forEach(function(t){var r=t.querySelectorAll('input');
if(r.length===2){(r[0].checked?r[1]:r[0]).checked=true;}});});
"""

_PAGE = Template("""<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
<meta name="generator" content="nl_unwarp $version">
<title>$title</title><style>$css</style></head>
<body><main>
<h1>$title</h1>
<p class="caution" id="caution"><strong>Research use.</strong> $caution</p>
$body
<footer>nl_unwarp $version &middot; $caution</footer>
</main><script>$script</script></body></html>
""")


class Cell:
    """A table cell: shown text, and the exact value for machines (``data-value``)."""

    def __init__(
        self, text: str, *, value=None, key: str | None = None, num: bool = False, raw_html: bool = False
    ) -> None:
        self.text, self.value, self.key, self.num, self.raw_html = text, value, key, num, raw_html

    def render(self) -> str:
        attrs = []
        if self.num:
            attrs.append('class="num"')
        if self.key is not None:
            attrs.append(f'data-key="{escape(self.key)}"')
        if self.value is not None:
            attrs.append(f'data-value="{escape(repr(self.value))}"')
        body = self.text if self.raw_html else escape(self.text)
        return f"<td {' '.join(attrs)}>{body}</td>" if attrs else f"<td>{body}</td>"


def number(value, digits: int = 3, *, key: str | None = None, unit: str = "") -> Cell:
    """A numeric cell shown with ``digits`` decimals; ``None`` and NaN show as "n/a"."""
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return Cell("n/a", key=key, num=True)
    text = f"{value:.{digits}f}" + (f" {unit}" if unit else "")
    return Cell(text, value=float(value), key=key, num=True)


def table(
    header: Sequence[str],
    rows: Iterable[Sequence],
    *,
    table_id: str | None = None,
    caption: str | None = None,
) -> str:
    """An HTML table; cells are :class:`Cell` or anything ``str`` shows (escaped)."""
    head = "".join(f"<th>{escape(h)}</th>" for h in header)
    thead = f"<thead><tr>{head}</tr></thead>" if any(header) else ""
    body = []
    for row in rows:
        cells = "".join(c.render() if isinstance(c, Cell) else f"<td>{escape(str(c))}</td>" for c in row)
        body.append(f"<tr>{cells}</tr>")
    ident = f' id="{escape(table_id)}"' if table_id else ""
    cap = f"<caption>{escape(caption)}</caption>" if caption else ""
    return f"<table{ident}>{cap}{thead}<tbody>{''.join(body)}</tbody></table>"


def key_value_table(items: Mapping[str, Cell | str], *, table_id: str | None = None) -> str:
    """A two-column table of labelled values (no header row)."""
    return table(["", ""], [[k, v] for k, v in items.items()], table_id=table_id)


def figure(png: bytes, caption: str, *, fig_id: str, alt: str) -> str:
    """A figure with its PNG embedded as a data URI."""
    data = base64.b64encode(png).decode("ascii")
    return (
        f'<figure id="{escape(fig_id)}"><img alt="{escape(alt)}" src="data:image/png;base64,{data}">'
        f"<figcaption>{escape(caption)}</figcaption></figure>"
    )


def toggle(ident: str, label_a: str, html_a: str, label_b: str, html_b: str) -> str:
    """Two panes and two radio buttons that show one or the other (the first by default)."""
    ident = escape(ident)
    return (
        f'<div class="toggle" id="{ident}">'
        f'<input type="radio" class="show-a" name="{ident}" id="{ident}-a" checked>'
        f'<label for="{ident}-a">{escape(label_a)}</label>'
        f'<input type="radio" class="show-b" name="{ident}" id="{ident}-b">'
        f'<label for="{ident}-b">{escape(label_b)}</label>'
        f'<span class="sub"> &nbsp;(press <kbd>t</kbd> to flip)</span>'
        f'<div class="pane a">{html_a}</div><div class="pane b">{html_b}</div></div>'
    )


def page(title: str, body: str) -> str:
    """A complete HTML document with the caution at the top and in the footer."""
    return _PAGE.substitute(
        title=escape(title),
        body=body,
        css=_CSS,
        script=_SCRIPT,
        caution=escape(CAUTION),
        version=escape(__version__),
    )

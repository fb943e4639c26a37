"""Coil model files: our own versioned JSON format, and a plain-table import.

The format is specified in ``docs/coil-model-format.md`` (with a JSON schema
beside it). The loader is strict: every problem raises
:class:`~nl_unwarp.errors.InputError` naming the file, the axis and the key.
"""

from __future__ import annotations

import csv
import hashlib
import json
import math
import re
from pathlib import Path

import numpy as np

from ..coil import AXES, LINEAR_TERMS, AxisExpansion, CoilModel
from ..errors import InputError
from ..harmonics import NORMALISATIONS, Basis, basis_factor
from .atomic import atomic_path
from .text import read_input_text

__all__ = [
    "FORMAT_NAME",
    "FORMAT_VERSION",
    "MAX_DEGREE",
    "coil_sha256",
    "coil_text",
    "import_table",
    "load_coil",
    "save_coil",
]

FORMAT_NAME = "nl_unwarp-coil"
FORMAT_VERSION = 1
#: Highest degree accepted; the recurrences are stable well beyond this.
MAX_DEGREE = 60
#: A linear coefficient further than this from 1 is almost always a unit or
#: normalisation mistake (common practice, no source).
LINEAR_TOLERANCE = 0.25
SOURCE_KINDS = ("design", "measurement", "fit")

_TOP_KEYS = {"format", "format_version", "label", "frame", "source", "axes"}
_SOURCE_KEYS = {"kind", "description", "date", "method", "samples", "degree", "residual_rms_mm",
                "residual_max_mm"}
#: Fit provenance (optional, source kind "fit"): integers and non-negative numbers of mm.
_SOURCE_COUNTS = ("samples", "degree")
_SOURCE_MM = ("residual_rms_mm", "residual_max_mm")
_AXIS_KEYS = {"normalisation", "condon_shortley", "reference_radius_mm", "valid_radius_mm",
              "cos", "sin"}


class _Constant(str):
    """A NaN/Infinity literal (not JSON, RFC 8259), kept only to report where it is."""


def _find_constant(obj, keys: tuple = ()) -> tuple | None:
    """Key path of the first non-finite literal in a parsed document, the literal last."""
    if isinstance(obj, _Constant):
        return keys + (str(obj),)
    children = obj.items() if isinstance(obj, dict) else enumerate(obj) if isinstance(obj, list) else ()
    for key, value in children:
        found = _find_constant(value, keys + (key,))
        if found is not None:
            return found
    return None


def _constant_message(found: tuple) -> str:
    *keys, literal = found
    names = [k for k in keys if isinstance(k, str)]
    if len(names) >= 3 and names[0] == "axes":
        where, key = f"axis {names[1]}: ", ".".join(names[2:])
    else:
        where, key = "", ".".join(names) or "(top level)"
    return f"{where}key '{key}': {literal} is not a number; write a finite value"


def coil_sha256(path: str | Path) -> str:
    """SHA-256 of a coil model file's bytes (what provenance records, never the path)."""
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


def load_coil(path: str | Path) -> CoilModel:
    """Load and validate a coil model file.

    Parameters
    ----------
    path : str or Path
        A file in the ``nl_unwarp-coil`` JSON format.

    Returns
    -------
    CoilModel
        Coefficients converted to Schmidt semi-normalisation without the
        Condon-Shortley phase.

    Raises
    ------
    InputError
        Naming the file, axis and key of the first problem found.
    """
    path = Path(path)
    src = str(path)
    try:
        doc = json.loads(path.read_text(encoding="utf-8"), parse_constant=_Constant)
    except FileNotFoundError:
        raise InputError(src, "coil model file not found") from None
    except (ValueError, UnicodeDecodeError) as exc:
        raise InputError(src, f"not valid JSON ({exc})") from None
    found = _find_constant(doc)
    if found is not None:
        raise InputError(src, _constant_message(found))
    return model_from_document(doc, src)


def model_from_document(doc: dict, src: str) -> CoilModel:
    """Validate a parsed coil document and build the model (see :func:`load_coil`)."""
    if not isinstance(doc, dict):
        raise InputError(src, "top level must be a JSON object")
    _no_unknown(doc, _TOP_KEYS, src, "")
    if doc.get("format") != FORMAT_NAME:
        raise InputError(src, f"key 'format' must be {FORMAT_NAME!r}, got {doc.get('format')!r}")
    if doc.get("format_version") != FORMAT_VERSION or isinstance(doc.get("format_version"), bool):
        raise InputError(src, f"key 'format_version': this version reads {FORMAT_VERSION}, "
                              f"got {doc.get('format_version')!r}")
    if doc.get("frame", "device") != "device":
        raise InputError(src, "key 'frame' must be 'device' (gradient-coil axes, LPS for HFS)")
    source = doc.get("source", {})
    if not isinstance(source, dict):
        raise InputError(src, "key 'source' must be an object")
    _no_unknown(source, _SOURCE_KEYS, src, "source.")
    if "kind" in source and source["kind"] not in SOURCE_KINDS:
        raise InputError(src, f"key 'source.kind' must be one of {', '.join(SOURCE_KINDS)}")
    texts = {"label": doc.get("label", ""), "source.description": source.get("description", ""),
             "source.date": source.get("date", ""), "source.method": source.get("method", "")}
    for key, value in texts.items():
        if not isinstance(value, str):
            raise InputError(src, f"key '{key}' must be a string, got {value!r}")
    _check_fit_figures(source, src)
    axes_doc = doc.get("axes")
    if not isinstance(axes_doc, dict):
        raise InputError(src, "key 'axes' missing or not an object")
    _no_unknown(axes_doc, set(AXES), src, "axes.")
    axes = {}
    for name in AXES:
        if name not in axes_doc:
            raise InputError(src, f"axis {name!r} missing under 'axes'")
        axes[name] = _axis_from_document(axes_doc[name], src, name)
    return CoilModel(axes=axes, label=doc.get("label", "unnamed"), source=dict(source))


def _check_fit_figures(source: dict, src: str) -> None:
    """The optional fit figures of ``source``: counts are integers >= 0, residuals mm >= 0."""
    for key in _SOURCE_COUNTS:
        value = source.get(key, 0)
        if isinstance(value, bool) or not isinstance(value, int) or value < 0:
            raise InputError(src, f"key 'source.{key}' must be a non-negative integer, got {value!r}")
    for key in _SOURCE_MM:
        value = source.get(key, 0.0)
        if isinstance(value, bool) or not isinstance(value, (int, float)) or not value >= 0:
            raise InputError(src, f"key 'source.{key}' must be a non-negative number of mm, got {value!r}")


def _no_unknown(obj: dict, allowed: set, src: str, prefix: str) -> None:
    unknown = sorted(set(obj) - allowed)
    if unknown:
        raise InputError(src, f"unknown key '{prefix}{unknown[0]}' (allowed: {', '.join(sorted(allowed))})")


def _radius(doc: dict, key: str, src: str, where: str) -> float:
    value = doc.get(key)
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise InputError(src, f"{where}: key '{key}' missing or not a number")
    if not math.isfinite(value) or value <= 0:
        raise InputError(src, f"{where}: key '{key}' must be a positive finite number of mm, got {value}")
    return float(value)


def _axis_from_document(doc, src: str, name: str) -> AxisExpansion:
    where = f"axis {name}"
    if not isinstance(doc, dict):
        raise InputError(src, f"{where}: must be an object")
    _no_unknown(doc, _AXIS_KEYS, src, f"axes.{name}.")
    normalisation = doc.get("normalisation", "schmidt")
    if normalisation not in NORMALISATIONS:
        raise InputError(src, f"{where}: key 'normalisation' must be one of {', '.join(NORMALISATIONS)}")
    cs = doc.get("condon_shortley", False)
    if not isinstance(cs, bool):
        raise InputError(src, f"{where}: key 'condon_shortley' must be true or false")
    basis = Basis(normalisation, cs)
    r0 = _radius(doc, "reference_radius_mm", src, where)
    valid = _radius(doc, "valid_radius_mm", src, where)
    terms = {kind: _terms(doc.get(kind, []), src, where, kind) for kind in ("cos", "sin")}
    degree = max([n for t in terms.values() for (n, _m) in t] or [1])
    alpha = np.zeros((max(degree, 1) + 1,) * 2)
    beta = np.zeros_like(alpha)
    for kind, table in (("cos", alpha), ("sin", beta)):
        for (n, m), value in terms[kind].items():
            table[n, m] = value * basis_factor(n, m, basis)
    axis = AxisExpansion(alpha, beta, r0, valid)
    linear = axis.linear_coefficient(name)
    if abs(linear - 1.0) > LINEAR_TOLERANCE:
        kind, n, m = LINEAR_TERMS[name]
        raise InputError(src, f"{where}: linear term {kind} n={n} m={m} is {linear:.6g}, expected "
                              "about 1 (dimensionless; field units convert as A / (G * R0))")
    return axis


def _terms(rows, src: str, where: str, kind: str) -> dict[tuple[int, int], float]:
    if not isinstance(rows, list):
        raise InputError(src, f"{where}: key '{kind}' must be a list of [n, m, value]")
    out: dict[tuple[int, int], float] = {}
    for row in rows:
        if (not isinstance(row, list) or len(row) != 3
                or not all(isinstance(v, int) and not isinstance(v, bool) for v in row[:2])
                or isinstance(row[2], bool) or not isinstance(row[2], (int, float))):
            raise InputError(src, f"{where}: key '{kind}': entry {row!r} is not [n, m, value]")
        n, m, value = row
        if not 0 <= m <= n <= MAX_DEGREE:
            raise InputError(src, f"{where}: key '{kind}': degree/order n={n} m={m} out of range "
                                  f"(0 <= m <= n <= {MAX_DEGREE})")
        if kind == "sin" and m == 0:
            raise InputError(src, f"{where}: key 'sin': order m=0 has no sine term (n={n})")
        if not math.isfinite(value):
            raise InputError(src, f"{where}: key '{kind}': value at n={n} m={m} is not finite")
        if (n, m) in out:
            raise InputError(src, f"{where}: key '{kind}': n={n} m={m} given twice")
        out[(n, m)] = float(value)
    return out


def model_to_document(model: CoilModel) -> dict:
    """The JSON document of a model, in Schmidt normalisation (exact floats)."""
    axes = {}
    for name in AXES:
        ax = model.axes[name]
        rows = {}
        for kind, table in (("cos", ax.alpha), ("sin", ax.beta)):
            n_idx, m_idx = np.nonzero(table)
            rows[kind] = [[int(n), int(m), float(table[n, m])] for n, m in zip(n_idx, m_idx, strict=True)]
        axes[name] = {
            "normalisation": "schmidt",
            "condon_shortley": False,
            "reference_radius_mm": float(ax.reference_radius_mm),
            "valid_radius_mm": float(ax.valid_radius_mm),
            **rows,
        }
    return {
        "format": FORMAT_NAME,
        "format_version": FORMAT_VERSION,
        "label": model.label,
        "frame": "device",
        "source": dict(model.source),
        "axes": axes,
    }


def _format_document(doc: dict) -> str:
    """JSON text with one ``[n, m, value]`` term per line (easy to read and diff)."""
    text = json.dumps(doc, indent=2, allow_nan=False)
    # Collapse each innermost [n, m, value] list onto one line. Requiring the
    # line breaks of indent=2 keeps text inside strings (where json.dumps
    # escapes line breaks) untouched.
    text = re.sub(r"\[\n\s*(-?\d+),\n\s*(-?\d+),\n\s*([^\s\[\]]+)\n\s*\]", r"[\1, \2, \3]", text)
    return text + "\n"


def coil_text(model: CoilModel) -> str:
    """The text :func:`save_coil` writes (for callers that write it within their own OutputSet)."""
    return _format_document(model_to_document(model))


def save_coil(model: CoilModel, path: str | Path) -> Path:
    """Write a model as a coil model file (atomically); returns the path.

    Floats are written with Python's shortest round-trip repr, so
    ``load_coil(save_coil(m, p))`` reproduces the coefficients exactly.
    """
    path = Path(path)
    text = _format_document(model_to_document(model))
    with atomic_path(path) as tmp:
        tmp.write_text(text, encoding="utf-8")
    return path


def import_table(
    path: str | Path,
    *,
    normalisation: str,
    condon_shortley: bool,
    reference_radius_mm: float,
    valid_radius_mm: float,
    gradient_mT_per_m: float | None = None,
    label: str = "imported",
    description: str = "",
    date: str = "",
    kind: str = "design",
) -> CoilModel:
    """Build a coil model from a plain table.

    Parameters
    ----------
    path : str or Path
        Tab- or comma-separated text with a header row naming the columns
        ``axis, degree, order, kind, value`` (``kind`` is ``cos`` or ``sin``).
    normalisation, condon_shortley : str, bool
        The basis the numbers are given in (stated by the user).
    reference_radius_mm, valid_radius_mm : float
        :math:`R_0` and the trusted radius, mm.
    gradient_mT_per_m : float, optional
        If given, values are field coefficients ``A`` in mT at this nominal
        gradient and convert as ``alpha = A / (G R0)`` with ``R0`` in metres.
    label, description, date, kind : str
        Provenance written to the model.

    Returns
    -------
    CoilModel
        Validated exactly as :func:`load_coil` validates a file.
    """
    src = str(path)
    text = read_input_text(path, "table file")
    lines = text.splitlines()
    wanted = ["axis", "degree", "order", "kind", "value"]
    if not lines:
        raise InputError(src, f"empty table; header must be: {', '.join(wanted)}")
    dialect = "excel-tab" if "\t" in lines[0] else "excel"
    reader = csv.DictReader(lines, dialect=dialect)
    if reader.fieldnames is None or [f.strip().lower() for f in reader.fieldnames] != wanted:
        raise InputError(src, f"header must be: {', '.join(wanted)}")
    scale = 1.0
    if gradient_mT_per_m is not None:
        field_mT = gradient_mT_per_m * reference_radius_mm / 1000.0
        if not (math.isfinite(field_mT) and field_mT > 0):
            raise InputError(src, "field units need a positive gradient_mT_per_m and reference_radius_mm")
        scale = 1.0 / field_mT
    axes: dict = {a: {"normalisation": normalisation, "condon_shortley": condon_shortley,
                      "reference_radius_mm": reference_radius_mm, "valid_radius_mm": valid_radius_mm,
                      "cos": [], "sin": []} for a in AXES}
    for row in reader:
        # line_num counts physical lines read, so blank lines (skipped) keep it right.
        line_no = reader.line_num
        if None in row:
            raise InputError(src, f"line {line_no}: more columns than the header")
        row = {k.strip().lower(): (v or "").strip() for k, v in row.items()}
        try:
            axis, kind_ = row["axis"].lower(), row["kind"].lower()
            entry = [int(row["degree"]), int(row["order"]), float(row["value"]) * scale]
        except ValueError:
            raise InputError(
                src, f"line {line_no}: degree and order must be integers, value a number"
            ) from None
        if axis not in axes or kind_ not in ("cos", "sin"):
            raise InputError(src, f"line {line_no}: axis must be x, y or z and kind cos or sin")
        axes[axis][kind_].append(entry)
    doc = {"format": FORMAT_NAME, "format_version": FORMAT_VERSION, "label": label,
           "frame": "device", "source": {"kind": kind, "description": description, "date": date},
           "axes": axes}
    return model_from_document(doc, src)

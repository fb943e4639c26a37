"""The BIDS-App's progress line: it counts the nodes nipype runs, reaches its total, and ends.

The reference for "the nodes nipype runs" is nipype's own record of them: every node it runs
writes one ``result_<name>.pklz`` into its folder of the work directory (nipype
documentation, "Workflow working directory"; the fault tests count them the same way).
"""

from __future__ import annotations

import contextlib
import io
import re

from bidsgen import T1W, T2W_2D, configure_nipype, make_study

from nl_unwarp.cli import _Progress, main

#: The progress line as _Progress prints it (a carriage return before each update).
PROGRESS = re.compile(r"\r  (\d+)/(\d+) pipeline steps done")


def test_last_progress_line_reaches_total_and_ends(tmp_path, monkeypatch):
    configure_nipype(tmp_path)
    study = make_study(tmp_path, monkeypatch, subjects_per_site=1)
    work = tmp_path / "work"
    both = io.StringIO()  # stdout and stderr in one stream, as a terminal shows them
    with contextlib.redirect_stdout(both), contextlib.redirect_stderr(both):
        code = main([str(study.root), str(tmp_path / "out"), "participant", "--site-config",
                     str(study.site_config), "-w", str(work), "--plugin", "Linear",
                     "--participant-label", "01", "--session-label", "1", "--datatype", "anat"])
    text = both.getvalue()
    assert code == 0, text
    counts = list(PROGRESS.finditer(text))
    assert counts, text
    last = counts[-1]
    done, total = int(last[1]), int(last[2])
    ran = len(list(work.rglob("result_*.pklz")))
    assert done == total == ran
    assert text[last.end()] == "\n"
    # The results table starts on a line of its own.
    assert any(line.startswith(T1W) for line in text.splitlines())
    assert any(line.startswith(T2W_2D) for line in text.splitlines())


def test_a_run_that_stops_short_still_ends_its_line(capsys):
    progress = _Progress()
    progress.nodes(1, 5)  # printed: the first update
    progress.nodes(3, 5)  # within a second: not printed yet
    progress.end_nodes()  # the run is over (two nodes crashed or were never run)
    err = capsys.readouterr().err
    assert err.endswith("\r  3/5 pipeline steps done\n")
    progress.end_nodes()  # nothing more to end
    assert capsys.readouterr().err == ""


def test_a_finished_count_is_not_printed_twice(capsys):
    progress = _Progress()
    progress.nodes(5, 5)
    progress.end_nodes()
    assert capsys.readouterr().err == "\r  5/5 pipeline steps done\n"

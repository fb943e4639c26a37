"""Run the ``nl-unwarp`` command in-process for tests (shared by the CLI test modules)."""

from __future__ import annotations

from nl_unwarp.cli import main


def run_main(argv, capsys) -> tuple[int, str, str]:
    """``main(argv)`` in-process; argparse's SystemExit becomes the code. Returns the exit
    code and the captured standard output and error."""
    try:
        code = main([str(a) for a in argv])
    except SystemExit as exc:
        code = exc.code
    captured = capsys.readouterr()
    return code, captured.out, captured.err

"""Reading a text input file with one-line errors (missing, a folder, not UTF-8)."""

from __future__ import annotations

import os
from pathlib import Path

from ..errors import InputError

__all__ = ["read_input_text"]


def read_input_text(path: str | os.PathLike, what: str) -> str:
    """The UTF-8 text of an input file.

    Parameters
    ----------
    path : path-like
        The file.
    what : str
        What the file is, for the messages (e.g. ``"table file"``).

    Raises
    ------
    InputError
        Naming the file: ``"<what> not found"``, ``"<what> is a folder, not a file"`` or
        ``"<what> is not UTF-8 text"``.
    """
    src = str(path)
    try:
        return Path(path).read_text(encoding="utf-8")
    except FileNotFoundError:
        raise InputError(src, f"{what} not found") from None
    except IsADirectoryError:
        raise InputError(src, f"{what} is a folder, not a file") from None
    except UnicodeDecodeError:
        raise InputError(src, f"{what} is not UTF-8 text") from None

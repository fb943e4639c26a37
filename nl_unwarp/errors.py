"""Exceptions that carry a message a user can act on."""

from __future__ import annotations

__all__ = ["InputError"]


class InputError(ValueError):
    """Bad input: the message names the file, the field and what to do.

    Parameters
    ----------
    source : str
        File (or option) the problem is in.
    message : str
        What is wrong there, and what to do.
    """

    def __init__(self, source: str, message: str) -> None:
        self.source = str(source)
        self.detail = message
        super().__init__(f"{source}: {message}")

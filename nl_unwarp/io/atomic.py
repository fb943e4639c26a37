"""Write outputs under a temporary name and rename them only when complete."""

from __future__ import annotations

import contextlib
import os
import secrets
from collections.abc import Iterator
from pathlib import Path

__all__ = ["OutputSet", "atomic_path", "full_suffix"]


def full_suffix(path: Path) -> str:
    """The extension that file readers dispatch on (``.nii.gz`` counts as one)."""
    name = path.name.lower()
    for double in (".nii.gz", ".tar.gz"):
        if name.endswith(double):
            return path.name[-len(double):]
    return path.suffix


def _temporary_name(path: Path) -> Path:
    suffix = full_suffix(path)
    stem = path.name[: len(path.name) - len(suffix)] if suffix else path.name
    return path.with_name(f".{stem}.partial-{secrets.token_hex(4)}{suffix}")


class OutputSet:
    """A group of output files that appear together or not at all.

    Each :meth:`reserve` gives a temporary path in the destination folder (same
    file system, same extension); :meth:`commit` renames them all into place;
    :meth:`discard` removes them. Used as a context manager, an exception
    discards and a normal exit commits.
    """

    def __init__(self) -> None:
        self._pending: list[tuple[Path, Path]] = []
        self._made_dirs: list[Path] = []

    def reserve(self, path: str | os.PathLike) -> Path:
        """Temporary path to write the file that will become ``path``."""
        final = Path(path)
        missing = [p for p in [final.parent, *final.parent.parents] if not p.exists()]
        final.parent.mkdir(parents=True, exist_ok=True)
        self._made_dirs.extend(missing)
        tmp = _temporary_name(final)
        self._pending.append((tmp, final))
        return tmp

    def commit(self) -> list[Path]:
        """Rename every reserved file into place; returns the final paths."""
        done = []
        for tmp, final in self._pending:
            os.replace(tmp, final)
            done.append(final)
        self._pending = []
        self._made_dirs = []
        return done

    def discard(self) -> None:
        """Remove every reserved temporary file that exists."""
        for tmp, _ in self._pending:
            with contextlib.suppress(FileNotFoundError):
                tmp.unlink()
        # Folders this set created, deepest first, if nothing else was put in them.
        for folder in self._made_dirs:
            with contextlib.suppress(OSError):
                folder.rmdir()
        self._pending = []
        self._made_dirs = []

    def __enter__(self) -> OutputSet:
        return self

    def __exit__(self, exc_type, exc, tb) -> None:
        if exc_type is None:
            self.commit()
        else:
            self.discard()


@contextlib.contextmanager
def atomic_path(path: str | os.PathLike) -> Iterator[Path]:
    """Context manager yielding a temporary path renamed to ``path`` on success."""
    with OutputSet() as outputs:
        yield outputs.reserve(path)

"""An exclusive lock on a folder shared by concurrent runs (several cluster jobs, one output folder)."""

from __future__ import annotations

import contextlib
import fcntl
import os
from collections.abc import Iterator
from pathlib import Path

__all__ = ["LOCK_NAME", "folder_lock"]

#: Lock file in the output folder. It stays (empty) after the runs: removing it while another
#: run waits on it would let a third run take a lock on a new file of the same name.
LOCK_NAME = ".nl_unwarp.lock"


@contextlib.contextmanager
def folder_lock(folder: str | os.PathLike) -> Iterator[Path]:
    """Hold an exclusive ``flock`` on ``folder/.nl_unwarp.lock`` inside the block; wait for it.

    ``flock`` (Linux flock(2)) locks are held per open file, so two processes, or two
    threads that each open the file, exclude each other; the kernel drops the lock when the
    holder exits, even if it is killed. On NFS, Linux implements ``flock`` with byte-range
    locks that the server sees (flock(2), "NFS details"; from memory, not tested here);
    Lustre needs the ``flock`` mount option (from memory).
    """
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / LOCK_NAME
    fd = os.open(path, os.O_RDWR | os.O_CREAT, 0o666)
    try:
        fcntl.flock(fd, fcntl.LOCK_EX)
        yield path
    finally:
        os.close(fd)  # closing the last descriptor releases the lock

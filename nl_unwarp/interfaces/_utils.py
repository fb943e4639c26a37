"""Small helpers shared by the Interfaces."""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

from nipype.interfaces.base import isdefined

__all__ = ["optional"]


def optional(inputs, name: str, convert: Callable[[Any], Any] | None = None) -> Any:
    """The value of input trait ``name``, ``convert``-ed if given, or None when it is undefined."""
    value = getattr(inputs, name)
    if not isdefined(value):
        return None
    return convert(value) if convert is not None else value


def one_blas_thread():
    """A context in which BLAS uses one thread (threadpoolctl), for the coil-model fits.

    Their dense solves (a 20,000 x 324 QR for a sample fit, ~1500 x 200 SVDs for a
    phantom fit) ran as fast on one thread as on two on the idle 2-core machine, and up
    to 8 (sample fit) and 10-200 (phantom fit) times slower threaded on a loaded one
    (``benchmarks/bench_fit.py``, ``benchmarks/bench_phantom_fit.py``).
    """
    from threadpoolctl import threadpool_limits

    return threadpool_limits(limits=1, user_api="blas")

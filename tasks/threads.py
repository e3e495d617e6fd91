"""Keep BLAS single-threaded inside the numerics.

The engine's linear algebra is small (state vectors of a few elements,
regressions with a few dozen columns).  A multi-threaded OpenBLAS spends more
time waking and spinning its threads than computing, and when several worker
processes share two cores the spinning starves them all: one ARMA(1,1) fit on
144 points measured 3.0 s with OpenBLAS's default threads on a loaded machine,
0.04 s with one thread.  Parallelism comes from processes over series instead.
"""

from __future__ import annotations

import functools
from collections.abc import Callable
from typing import ParamSpec, TypeVar

from threadpoolctl import threadpool_limits

P = ParamSpec("P")
R = TypeVar("R")


def single_blas_thread(func: Callable[P, R]) -> Callable[P, R]:
    """Run ``func`` with BLAS limited to one thread (about 0.6 ms per call)."""

    @functools.wraps(func)
    def wrapper(*args: P.args, **kwargs: P.kwargs) -> R:
        with threadpool_limits(limits=1, user_api="blas"):
            return func(*args, **kwargs)

    return wrapper

"""Keep BLAS single-threaded inside the numerics.

The engine's linear algebra is small (state vectors of a few elements,
regressions with a few dozen columns).  A multi-threaded OpenBLAS spends more
time waking and spinning its threads than computing, and when several worker
processes share two cores the spinning starves them all: one ARMA(1,1) fit on
144 points measured 3.0 s with OpenBLAS's default threads on a loaded machine,
0.04 s with one thread.  Parallelism comes from processes over series instead.

The limit is process-wide (BLAS has one thread pool per process), so it is
reference-counted: with several threads analysing series at once, it is set
when the first enters and restored when the last leaves.  Toggling it per call
would let one thread change the pool under another's computation, which makes
results differ in their last bits from run to run.
"""

from __future__ import annotations

import functools
import threading
from collections.abc import Callable
from typing import Any, ParamSpec, TypeVar

from threadpoolctl import ThreadpoolController

P = ParamSpec("P")
R = TypeVar("R")


@functools.cache
def _controller() -> ThreadpoolController:
    """Scanning the loaded libraries costs about 4 ms (with Prefect, pyarrow and
    statsmodels loaded); done once, a limit then costs about 0.02 ms."""
    return ThreadpoolController()


_lock = threading.Lock()
_depth = 0
_limiter: Any = None


def _enter() -> None:
    global _depth, _limiter
    with _lock:
        if _depth == 0:
            _limiter = _controller().limit(limits=1, user_api="blas")
        _depth += 1


def _leave() -> None:
    global _depth, _limiter
    with _lock:
        _depth -= 1
        if _depth == 0 and _limiter is not None:
            _limiter.restore_original_limits()
            _limiter = None


def single_blas_thread(func: Callable[P, R]) -> Callable[P, R]:
    """Run ``func`` with BLAS limited to one thread."""

    @functools.wraps(func)
    def wrapper(*args: P.args, **kwargs: P.kwargs) -> R:
        _enter()
        try:
            return func(*args, **kwargs)
        finally:
            _leave()

    return wrapper

"""Thin Prefect wrappers, built on first use.

``import prefect`` costs one to two seconds, which a one-off ``changekind detect``
should not pay.  Each step module therefore declares its wrappers in a dict and
forwards attribute look-ups here (PEP 562 module ``__getattr__``); the wrapper is
built once, with ``prefect.task``, the first time a flow asks for it.
"""

from __future__ import annotations

import sys
from collections.abc import Callable
from typing import Any

TaskSpec = tuple[Callable[..., Any], dict[str, Any]]


def lazy_task(module: str, name: str, specs: dict[str, TaskSpec]) -> Any:
    """Return ``module.name``, building it from ``specs`` on first use."""
    if name not in specs:
        raise AttributeError(f"module {module!r} has no attribute {name!r}")
    from prefect import task

    func, options = specs[name]
    wrapped = task(**options)(func)
    setattr(sys.modules[module], name, wrapped)
    return wrapped

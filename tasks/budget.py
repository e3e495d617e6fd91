"""A per-series work budget: the engine stops refining when it is spent.

The cold analysis of a series refines its answer in bounded loops (outer
re-estimation passes, the one-at-a-time search, the final pruning).  A
:class:`WorkBudget` caps the whole: wall-clock seconds, exact likelihood fits
and events searched for.  When one runs out the engine keeps what it has,
marks the result (``DetectionResult.budget_spent``) and says where in its
notes; it never runs on.
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field


@dataclass(frozen=True, slots=True)
class WorkBudget:
    """Limits on the work spent on one series.

    Parameters
    ----------
    seconds : float, default=20.0
        Wall-clock seconds.  The measured cost of a cold analysis is well under
        a second for series up to 30,000 points (tests/benchmarks/RESULTS.md),
        so the default only stops pathological cases.
    exact_fits : int, default=4
        Exact likelihood (state-space) fits, fallbacks included.
    events : int, default=200
        Events searched for in one pass (the search takes one at a time).
    """

    seconds: float = 20.0
    exact_fits: int = 4
    events: int = 200

    def __post_init__(self) -> None:
        if not self.seconds > 0 or self.exact_fits < 0 or self.events < 1:
            raise ValueError(
                "a work budget needs seconds > 0, exact_fits >= 0 and events >= 1; "
                f"got {self.seconds}, {self.exact_fits}, {self.events}"
            )


DEFAULT_BUDGET = WorkBudget()


@dataclass(slots=True)
class Spend:
    """What one analysis has spent of its budget (internal to one call)."""

    budget: WorkBudget
    started: float = field(default_factory=time.perf_counter)
    fits: int = 0
    spent_at: list[str] = field(default_factory=list)

    def elapsed(self) -> float:
        return time.perf_counter() - self.started

    def out_of_time(self) -> bool:
        return self.elapsed() > self.budget.seconds

    def can_fit(self) -> bool:
        return self.fits < self.budget.exact_fits and not self.out_of_time()

    def stop(self, where: str) -> None:
        """Record that refining stopped at ``where`` for lack of budget."""
        if where not in self.spent_at:
            self.spent_at.append(where)

    def notes(self) -> list[str]:
        if not self.spent_at:
            return []
        b = self.budget
        return [
            f"work budget spent ({b.seconds:g} s, {b.exact_fits} exact fits, {b.events} events "
            f"a pass): stopped refining at {', '.join(self.spent_at)}; the result is what was "
            "found by then"
        ]

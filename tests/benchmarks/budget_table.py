"""The smallest effect the false-alarm budget lets through, by type and spacing (prints).

Run: ``.venv/bin/python -m tests.benchmarks.budget_table [BUDGET ...]``.

An effect of size omega at time T has t = omega * ||h|| / sigma, where h is
the type's residual signature under the model (changekind.tasks.search
.residual_patterns) and sigma the innovation (noise) sigma; it is reported
once |t| clears the critical value, so the smallest effect that can clear it
is ``critical / ||h||`` noise sigma.  The critical value is
``budget_critical(spacing, budget)`` (changekind.tasks.critical), the one the
fleet runs use.  h is taken over the 60 points after the event (one hour of
minute data; a level shift's ||h|| grows with the points after it, so a
confirmed shift rests on more); TC at its default decay 0.7.  Two models: white
noise and the AR(1) with phi 0.6 of the fleet simulations.  The heavy-tailed
rows use the tail that :func:`fit_tail` finds in 20,000 Student-t(3)
innovations scaled to unit variance, in units of the engine's robust sigma.
"""

from __future__ import annotations

import sys

import numpy as np

from changekind.tasks.critical import FALSE_BUDGET, budget_critical, fit_tail
from changekind.tasks.effects import TC_DECAY
from changekind.tasks.search import residual_patterns, robust_sigma

SPACINGS = {"minute": 60.0, "5-minute": 300.0, "hourly": 3600.0}
HORIZON = 60
MODELS = {"white noise": 0.0, "AR(1) phi 0.6": 0.6}


def norms(phi: float) -> dict[str, float]:
    pi = np.zeros(HORIZON)
    pi[0] = 1.0
    if HORIZON > 1:
        pi[1] = -phi
    pats = residual_patterns(pi, deltas=(TC_DECAY,))
    return {
        "AO": float(np.linalg.norm(pats["AO"])),
        "LS": float(np.linalg.norm(pats["LS"])),
        "TC": float(np.linalg.norm(pats["TC"][TC_DECAY])),
        "IO": float(np.linalg.norm(pats["IO"])),
    }


def heavy_tail():
    rng = np.random.default_rng(3)
    z = rng.standard_t(3, size=20_000) / np.sqrt(3.0)
    return fit_tail(z, robust_sigma(z))


def table(budget: float) -> list[str]:
    tail = heavy_tail()
    lines = [
        f"false-alarm budget {budget:g} per series per 30 days "
        f"(heavy: Student t df {tail.df:.2f}, scale {tail.scale:.3f})",
        "| spacing | tails | critical |t| | model | AO | LS | TC | IO |",
        "|---|---|---|---|---|---|---|---|",
    ]
    for name, step in SPACINGS.items():
        for tails, t in (("Gaussian", None), ("t(3)", tail)):
            crit = budget_critical(step, budget, tail=t)
            for model, phi in MODELS.items():
                h = norms(phi)
                cells = " | ".join(f"{crit / h[k]:.2f}" for k in ("AO", "LS", "TC", "IO"))
                lines.append(f"| {name} | {tails} | {crit:.2f} | {model} | {cells} |")
    return lines


if __name__ == "__main__":
    budgets = [float(b) for b in sys.argv[1:]] or [FALSE_BUDGET]
    for b in budgets:
        print("\n".join(table(b)))
        print()

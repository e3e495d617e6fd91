"""The run summary's refit reasons (flows/pipeline.py: refit_reasons, refit_text)."""

from __future__ import annotations

from changekind.flows.pipeline import refit_reasons, refit_text
from changekind.tasks.batch import SeriesOutcome


def test_reasons_are_counted_from_the_outcomes():
    outcomes = [
        SeriesOutcome("a", "cold", note="refit: age"),
        SeriesOutcome("b", "cold", note="refit: variance drift"),
        SeriesOutcome("c", "cold", note="refit: age"),
        SeriesOutcome("d", "warm", note="coefficients re-estimated: confirmed LS"),
        SeriesOutcome("e", "unchanged", note="refit deferred: age", refit_deferred=True),
        SeriesOutcome("f", "warm"),
    ]
    refits, deferred = refit_reasons(outcomes)
    assert refits == (("age", 2), ("re-estimated after confirmed LS", 1), ("variance drift", 1))
    assert deferred == 1
    assert refit_text(refits, deferred) == (
        "refits: 4 (age 2, re-estimated after confirmed LS 1, variance drift 1); "
        "1 deferred to later runs (refit rate limit)"
    )
    assert refit_reasons([SeriesOutcome("f", "warm")]) == ((), 0)

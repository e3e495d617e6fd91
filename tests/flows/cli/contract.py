"""The command-line contract the CLI tests check against, written out from the README."""

from __future__ import annotations

# README, "Usage: changekind detect": one record of --json output
RECORD_FIELDS: tuple[str, ...] = (
    "series_id",
    "event_time",
    "event_type",
    "effect",
    "effect_pct",
    "effect_sigma",
    "t_stat",
    "se",
    "type_weights",
    "status",
    "decay",
    "half_life",
    "duration",
    "level",
    "model",
    "window_start",
    "window_end",
)
"""The fields of one ``detect --json`` record, in their order."""

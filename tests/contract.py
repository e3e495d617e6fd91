"""The command-line contracts the tests check against, written out from the README."""

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

# README, "Seeing them" (changekind incidents --json): keys every incident object has
INCIDENT_FIELDS: frozenset[str] = frozenset(
    {
        "incident_id",
        "start",
        "end",
        "n_series",
        "share_of_fleet",
        "dominant_type",
        "median_effect_pct",
        "shared_labels",
        "members",
    }
)
"""Keys of one incident record (it has more; these the tests require)."""

INCIDENT_MEMBER_FIELDS: frozenset[str] = frozenset(
    {"series_id", "event_time", "event_type", "effect"}
)
"""Keys of one member of an incident record."""

"""The command-line contracts the tests check: read from the README, or copied from its prose."""

from __future__ import annotations

import json
from pathlib import Path

README = Path(__file__).resolve().parents[1] / "README.md"


def _readme_record() -> dict[str, object]:
    """The example record of README, "Usage: changekind detect" (its first JSON block after
    'One record of `--json` output')."""
    text = README.read_text(encoding="utf-8")
    after = text.index("One record of `--json` output")
    start = text.index("```json\n", after) + len("```json\n")
    return json.loads(text[start : text.index("```", start)])


RECORD_FIELDS: tuple[str, ...] = tuple(_readme_record())
"""The fields of one ``detect --json`` record, in their order (the README's example)."""

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

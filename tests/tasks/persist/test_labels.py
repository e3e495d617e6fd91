"""Stored series attributes (``persist.write_labels``/``read_labels``), on a real
SQLite file and the real PostgreSQL server.

Reference: the frame written (three invented series, two labels); the change
log must hold exactly the changes between the frames written.
"""

from __future__ import annotations

from datetime import UTC, datetime, timedelta

import pandas as pd
import sqlalchemy as sa

from changekind.tasks import persist
from changekind.tasks.persist.schema import series_label_changes

T0 = datetime(2031, 5, 7, 1, 0, tzinfo=UTC)


def test_labels_are_stored_once_and_changes_logged(engine) -> None:
    frame = pd.DataFrame(
        {
            "series_id": ["a", "b", "c"],
            "observed_at": ["2031-05-06T10:00:00", "2031-05-06T10:00:00", None],
            "rack": ["r1", "r1", "r2"],
            "firmware": ["9.3", None, float("nan")],
        }
    )
    assert persist.write_labels(engine, "run-1", frame, at=T0) == 6
    before = persist.table_snapshot(engine)
    assert persist.write_labels(engine, "run-2", frame, at=T0 + timedelta(hours=1)) == 0
    assert persist.table_snapshot(engine) == before
    assert persist.read_labels(engine) == {
        "a": {"firmware": "9.3", "rack": "r1"},
        "b": {"firmware": None, "rack": "r1"},
        "c": {"firmware": None, "rack": "r2"},
    }
    changed = frame.assign(firmware=["9.4", "9.4", None])
    assert persist.write_labels(engine, "run-3", changed, at=T0 + timedelta(hours=2)) == 2
    with engine.connect() as conn:
        log = conn.execute(
            sa.select(
                series_label_changes.c.series_id,
                series_label_changes.c.old_value,
                series_label_changes.c.new_value,
                series_label_changes.c.run_id,
            )
            .where(series_label_changes.c.label == "firmware")
            .order_by(series_label_changes.c.change_id)
        ).all()
    assert [tuple(r) for r in log] == [
        ("a", None, "9.3", "run-1"),
        ("b", None, None, "run-1"),
        ("c", None, None, "run-1"),
        ("a", "9.3", "9.4", "run-3"),
        ("b", None, "9.4", "run-3"),
    ]
    assert persist.read_labels(engine, ["a"]) == {"a": {"firmware": "9.4", "rack": "r1"}}

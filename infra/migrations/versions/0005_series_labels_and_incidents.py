"""Series attributes and fleet incidents, with their BI views.

Revision ID: 0005
Revises: 0004
Create Date: 2026-12-05 00:00:00

``series_labels`` (current value of each label of each series) and
``series_label_changes`` (their history); ``incidents``, ``incident_members``,
``incident_labels``, ``incident_revisions`` and ``incident_sync`` (how far the
incidents are up to date).  Views ``open_incidents`` (one row per open
incident) and ``event_labels`` (each event with the labels of its series, one
row per event and label).  New tables and views only: existing rows are
untouched.
"""

from __future__ import annotations

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0005"
down_revision: str | Sequence[str] | None = "0004"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None

_OPEN_INCIDENTS = """
CREATE VIEW open_incidents AS
SELECT incident_id, quantity, direction, start_ts, end_ts, n_series, fleet_size,
       share_of_fleet, dominant_type, median_effect_pct, n_provisional, shared_labels,
       first_seen, last_seen, last_run_id
FROM incidents
WHERE state = 'open'
"""

_EVENT_LABELS = """
CREATE VIEW event_labels AS
SELECT e.series_id, e.event_time, e.event_ts, e.event_type, e.status, e.effect,
       e.effect_pct, e.t_stat, l.label, l.value
FROM series_events e
JOIN series_labels l ON l.series_id = e.series_id
"""

VIEW_NAMES = ("open_incidents", "event_labels")


def view_statements(dialect: str) -> list[str]:
    """The CREATE VIEW statements of this revision for ``dialect`` (the same for both)."""
    if dialect not in ("sqlite", "postgresql"):
        raise ValueError(f"no view definitions for dialect {dialect!r}; use sqlite or postgresql")
    return [_OPEN_INCIDENTS.strip(), _EVENT_LABELS.strip()]


def upgrade() -> None:
    op.create_table(
        "series_labels",
        sa.Column("series_id", sa.Text(), nullable=False),
        sa.Column("label", sa.Text(), nullable=False),
        sa.Column("value", sa.Text(), nullable=True),
        sa.Column("observed_at", sa.Text(), nullable=True),
        sa.Column("last_run_id", sa.Text(), nullable=False),
        sa.Column("last_seen", sa.DateTime(timezone=True), nullable=False),
        sa.PrimaryKeyConstraint("series_id", "label", name=op.f("pk_series_labels")),
    )
    op.create_index("ix_series_labels_label_value", "series_labels", ["label", "value"])
    op.create_table(
        "series_label_changes",
        sa.Column("change_id", sa.Integer(), autoincrement=True, nullable=False),
        sa.Column("series_id", sa.Text(), nullable=False),
        sa.Column("label", sa.Text(), nullable=False),
        sa.Column("old_value", sa.Text(), nullable=True),
        sa.Column("new_value", sa.Text(), nullable=True),
        sa.Column("observed_at", sa.Text(), nullable=True),
        sa.Column("run_id", sa.Text(), nullable=False),
        sa.Column("changed_at", sa.DateTime(timezone=True), nullable=False),
        sa.PrimaryKeyConstraint("change_id", name=op.f("pk_series_label_changes")),
    )
    op.create_index(
        "ix_series_label_changes_series", "series_label_changes", ["series_id", "label"]
    )
    op.create_table(
        "incidents",
        sa.Column("incident_id", sa.Text(), nullable=False),
        sa.Column("quantity", sa.Text(), nullable=False),
        sa.Column("direction", sa.Text(), nullable=False),
        sa.Column("start_ts", sa.DateTime(timezone=True), nullable=False),
        sa.Column("end_ts", sa.DateTime(timezone=True), nullable=False),
        sa.Column("n_series", sa.Integer(), nullable=False),
        sa.Column("fleet_size", sa.Integer(), nullable=False),
        sa.Column("share_of_fleet", sa.Float(), nullable=False),
        sa.Column("dominant_type", sa.Text(), nullable=False),
        sa.Column("type_counts", sa.Text(), nullable=False),
        sa.Column("median_effect_pct", sa.Float(), nullable=True),
        sa.Column("n_provisional", sa.Integer(), nullable=False),
        sa.Column("shared_labels", sa.Text(), nullable=False),
        sa.Column("state", sa.Text(), nullable=False),
        sa.Column("first_run_id", sa.Text(), nullable=False),
        sa.Column("last_run_id", sa.Text(), nullable=False),
        sa.Column("first_seen", sa.DateTime(timezone=True), nullable=False),
        sa.Column("last_seen", sa.DateTime(timezone=True), nullable=False),
        sa.PrimaryKeyConstraint("incident_id", name=op.f("pk_incidents")),
        sa.CheckConstraint("quantity IN ('level', 'spread')", name=op.f("ck_incidents_quantity")),
        sa.CheckConstraint("direction IN ('up', 'down')", name=op.f("ck_incidents_direction")),
        sa.CheckConstraint(
            "dominant_type IN ('AO', 'LS', 'TC', 'IO', 'VC')",
            name=op.f("ck_incidents_dominant_type"),
        ),
        sa.CheckConstraint("state IN ('open', 'settled')", name=op.f("ck_incidents_state")),
    )
    op.create_index("ix_incidents_start_ts", "incidents", ["start_ts"])
    op.create_index("ix_incidents_end_ts", "incidents", ["end_ts"])
    op.create_table(
        "incident_members",
        sa.Column("incident_id", sa.Text(), nullable=False),
        sa.Column("series_id", sa.Text(), nullable=False),
        sa.Column("event_time", sa.Text(), nullable=False),
        sa.Column("event_ts", sa.DateTime(timezone=True), nullable=False),
        sa.Column("event_type", sa.Text(), nullable=False),
        sa.Column("effect", sa.Float(), nullable=False),
        sa.Column("effect_pct", sa.Float(), nullable=True),
        sa.Column("t_stat", sa.Float(), nullable=False),
        sa.Column("status", sa.Text(), nullable=False),
        sa.PrimaryKeyConstraint("incident_id", "series_id", name=op.f("pk_incident_members")),
        sa.ForeignKeyConstraint(
            ["incident_id"],
            ["incidents.incident_id"],
            name=op.f("fk_incident_members_incident_id_incidents"),
            ondelete="CASCADE",
        ),
    )
    op.create_index("ix_incident_members_event", "incident_members", ["series_id", "event_time"])
    op.create_table(
        "incident_labels",
        sa.Column("incident_id", sa.Text(), nullable=False),
        sa.Column("label", sa.Text(), nullable=False),
        sa.Column("value", sa.Text(), nullable=False),
        sa.Column("members_with", sa.Integer(), nullable=False),
        sa.Column("members_known", sa.Integer(), nullable=False),
        sa.Column("fleet_with", sa.Integer(), nullable=False),
        sa.Column("fleet_known", sa.Integer(), nullable=False),
        sa.Column("p_value", sa.Float(), nullable=False),
        sa.Column("p_adjusted", sa.Float(), nullable=False),
        sa.Column("shared", sa.Boolean(), nullable=False),
        sa.PrimaryKeyConstraint("incident_id", "label", "value", name=op.f("pk_incident_labels")),
        sa.ForeignKeyConstraint(
            ["incident_id"],
            ["incidents.incident_id"],
            name=op.f("fk_incident_labels_incident_id_incidents"),
            ondelete="CASCADE",
        ),
    )
    op.create_table(
        "incident_revisions",
        sa.Column("revision_id", sa.Integer(), autoincrement=True, nullable=False),
        sa.Column("incident_id", sa.Text(), nullable=False),
        sa.Column("run_id", sa.Text(), nullable=False),
        sa.Column("change", sa.Text(), nullable=False),
        sa.Column("n_series", sa.Integer(), nullable=True),
        sa.Column("added", sa.Text(), nullable=False),
        sa.Column("removed", sa.Text(), nullable=False),
        sa.Column("supersedes", sa.Text(), nullable=False),
        sa.Column("superseded_by", sa.Text(), nullable=False),
        sa.Column("changed_at", sa.DateTime(timezone=True), nullable=False),
        sa.PrimaryKeyConstraint("revision_id", name=op.f("pk_incident_revisions")),
        sa.CheckConstraint(
            "change IN ('new', 'grown', 'shrunk', 'changed', 'gone')",
            name=op.f("ck_incident_revisions_change"),
        ),
    )
    op.create_index("ix_incident_revisions_incident_id", "incident_revisions", ["incident_id"])
    op.create_index("ix_incident_revisions_run_id", "incident_revisions", ["run_id"])
    op.create_table(
        "incident_sync",
        sa.Column("name", sa.Text(), nullable=False),
        sa.Column("revision_id", sa.Integer(), nullable=False),
        sa.Column("observed_start", sa.DateTime(timezone=True), nullable=True),
        sa.Column("observed_end", sa.DateTime(timezone=True), nullable=True),
        sa.PrimaryKeyConstraint("name", name=op.f("pk_incident_sync")),
    )
    for sql in view_statements(op.get_bind().dialect.name):
        op.execute(sql)


def downgrade() -> None:
    for name in reversed(VIEW_NAMES):
        op.execute(f"DROP VIEW IF EXISTS {name}")
    op.drop_table("incident_sync")
    op.drop_index("ix_incident_revisions_run_id", table_name="incident_revisions")
    op.drop_index("ix_incident_revisions_incident_id", table_name="incident_revisions")
    op.drop_table("incident_revisions")
    op.drop_table("incident_labels")
    op.drop_index("ix_incident_members_event", table_name="incident_members")
    op.drop_table("incident_members")
    op.drop_index("ix_incidents_end_ts", table_name="incidents")
    op.drop_index("ix_incidents_start_ts", table_name="incidents")
    op.drop_table("incidents")
    op.drop_index("ix_series_label_changes_series", table_name="series_label_changes")
    op.drop_table("series_label_changes")
    op.drop_index("ix_series_labels_label_value", table_name="series_labels")
    op.drop_table("series_labels")

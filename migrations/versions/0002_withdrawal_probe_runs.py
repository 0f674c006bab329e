"""dataset withdrawal and purge; bias-probe runs

Revision ID: 0002
Revises: 0001
Create Date: 2026-12-06 10:00:00

Metadata edits keep their history in the audit trail (``dataset.edit`` events
with the old and new values); this revision adds what the audit trail cannot
hold: the withdrawal state of a dataset and the probe runs the worker executes.
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0002"
down_revision = "0001"
branch_labels = None
depends_on = None


def upgrade() -> None:
    with op.batch_alter_table("datasets", schema=None) as batch_op:
        batch_op.add_column(sa.Column("withdrawn_at", sa.DateTime(), nullable=True))
        batch_op.add_column(sa.Column("withdrawn_reason", sa.Text(), nullable=False,
                                      server_default=""))
        batch_op.add_column(sa.Column("files_purged_at", sa.DateTime(), nullable=True))
    op.create_table(
        "probe_runs",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("dataset_id", sa.Integer(), nullable=False),
        sa.Column("report_id", sa.Integer(), nullable=True),
        sa.Column("requested_by_id", sa.Integer(), nullable=True),
        sa.Column("state", sa.String(length=16), nullable=False),
        sa.Column("acceleration", sa.Float(), nullable=False),
        sa.Column("family", sa.String(length=32), nullable=False),
        sa.Column("slices", sa.Integer(), nullable=False),
        sa.Column("progress", sa.JSON(), nullable=True),
        sa.Column("result", sa.JSON(), nullable=True),
        sa.Column("gap", sa.Float(), nullable=True),
        sa.Column("error", sa.Text(), nullable=True),
        sa.Column("lease_owner", sa.String(length=200), nullable=True),
        sa.Column("lease_expires_at", sa.DateTime(), nullable=True),
        sa.Column("updated_at", sa.DateTime(), nullable=False),
        sa.Column("created_at", sa.DateTime(), nullable=False),
        sa.Column("finished_at", sa.DateTime(), nullable=True),
        sa.ForeignKeyConstraint(["dataset_id"], ["datasets.id"], ondelete="CASCADE"),
        sa.ForeignKeyConstraint(["requested_by_id"], ["users.id"]),
        sa.PrimaryKeyConstraint("id"),
    )
    with op.batch_alter_table("probe_runs", schema=None) as batch_op:
        batch_op.create_index(batch_op.f("ix_probe_runs_dataset_id"), ["dataset_id"],
                              unique=False)
        batch_op.create_index(batch_op.f("ix_probe_runs_state"), ["state"], unique=False)


def downgrade() -> None:
    with op.batch_alter_table("probe_runs", schema=None) as batch_op:
        batch_op.drop_index(batch_op.f("ix_probe_runs_state"))
        batch_op.drop_index(batch_op.f("ix_probe_runs_dataset_id"))
    op.drop_table("probe_runs")
    with op.batch_alter_table("datasets", schema=None) as batch_op:
        batch_op.drop_column("files_purged_at")
        batch_op.drop_column("withdrawn_reason")
        batch_op.drop_column("withdrawn_at")

"""API token scope: may a token make new tokens

Revision ID: 0003
Revises: 0002
Create Date: 2026-12-20 10:00:00

Issue 21, finding 10: a token could mint tokens that outlived its own
revocation. Existing tokens get ``may_create_tokens = false``: a script that
needs to make tokens asks for a token with that permission.
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0003"
down_revision = "0002"
branch_labels = None
depends_on = None


def upgrade() -> None:
    with op.batch_alter_table("api_tokens", schema=None) as batch_op:
        batch_op.add_column(sa.Column("may_create_tokens", sa.Boolean(), nullable=False,
                                      server_default=sa.false()))


def downgrade() -> None:
    with op.batch_alter_table("api_tokens", schema=None) as batch_op:
        batch_op.drop_column("may_create_tokens")

"""Verdict and careless score per respondent.

Revision ID: 0002
Revises: 0001
Create Date: 2026-12-02
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0002"
down_revision = "0001"
branch_labels = None
depends_on = None


def upgrade() -> None:
    with op.batch_alter_table("respondents") as batch:
        batch.add_column(
            sa.Column(
                "verdict",
                sa.Enum("ok", "review", "likely_careless", name="verdict", native_enum=False,
                        length=16),
                nullable=False,
                server_default="ok",
            )
        )
        batch.add_column(sa.Column("careless_score", sa.Float(), nullable=True))
    op.create_index(
        "ix_respondents_careless_score", "respondents", ["survey_id", "careless_score", "id"]
    )


def downgrade() -> None:
    op.drop_index("ix_respondents_careless_score", table_name="respondents")
    with op.batch_alter_table("respondents") as batch:
        batch.drop_column("careless_score")
        batch.drop_column("verdict")

"""Careless-score listings break ties by the flag count: the index follows that order.

Revision ID: 0009
Revises: 0008
Create Date: 2026-12-03
"""

from __future__ import annotations

from alembic import op

revision = "0009"
down_revision = "0008"
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.drop_index("ix_respondents_careless_score", table_name="respondents")
    op.create_index(
        "ix_respondents_careless_score", "respondents",
        ["survey_id", "careless_score", "flag_count", "id"],
    )


def downgrade() -> None:
    op.drop_index("ix_respondents_careless_score", table_name="respondents")
    op.create_index(
        "ix_respondents_careless_score", "respondents", ["survey_id", "careless_score", "id"]
    )

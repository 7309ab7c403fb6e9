"""Screening history: earlier results kept when a re-screen changes them; the screening
fingerprint a respondent's result was produced with.

Revision ID: 0003
Revises: 0002
Create Date: 2026-12-02
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0003"
down_revision = "0002"
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table(
        "screening_history",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("respondent_pk", sa.Integer(), nullable=False),
        sa.Column("survey_version_id", sa.Integer(), nullable=False),
        sa.Column("reference_id", sa.Integer(), nullable=True),
        sa.Column("screened_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("replaced_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("flag_count", sa.SmallInteger(), nullable=False),
        sa.Column("flags", sa.String(length=500), nullable=False),
        sa.Column(
            "verdict",
            sa.Enum("ok", "review", "likely_careless", name="verdict", native_enum=False,
                    length=16),
            nullable=False,
        ),
        sa.Column("careless_score", sa.Float(), nullable=True),
        sa.Column("results", sa.JSON(), nullable=False),
        sa.ForeignKeyConstraint(["respondent_pk"], ["respondents.id"], ondelete="CASCADE"),
        sa.ForeignKeyConstraint(["survey_version_id"], ["survey_versions.id"]),
        sa.ForeignKeyConstraint(["reference_id"], ["reference_samples.id"], ondelete="SET NULL"),
        sa.PrimaryKeyConstraint("id"),
    )
    op.create_index(
        op.f("ix_screening_history_respondent_pk"),
        "screening_history",
        ["respondent_pk"],
        unique=False,
    )
    with op.batch_alter_table("respondents") as batch:
        batch.add_column(sa.Column("screened_with", sa.String(length=64), nullable=True))


def downgrade() -> None:
    with op.batch_alter_table("respondents") as batch:
        batch.drop_column("screened_with")
    op.drop_index(op.f("ix_screening_history_respondent_pk"), table_name="screening_history")
    op.drop_table("screening_history")

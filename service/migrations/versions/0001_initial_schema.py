"""Initial schema: keys, surveys and versions, respondents, detector outcomes, reviews.

Revision ID: 0001
Revises:
Create Date: 2026-12-02
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0001"
down_revision = None
branch_labels = None
depends_on = None


def _late_keys(sqlite: bool) -> list[sa.ForeignKeyConstraint]:
    if not sqlite:
        return []
    return [
        sa.ForeignKeyConstraint(
            ["current_version_id"], ["survey_versions.id"], name="fk_surveys_current_version"
        ),
        sa.ForeignKeyConstraint(
            ["current_reference_id"], ["reference_samples.id"], name="fk_surveys_current_reference"
        ),
    ]


def upgrade() -> None:
    # SQLite cannot add a foreign key later; it checks them lazily, so they go in at once.
    sqlite = op.get_bind().dialect.name == "sqlite"
    op.create_table(
        "api_keys",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("name", sa.String(length=100), nullable=False),
        sa.Column(
            "role",
            sa.Enum("ingest", "analyst", "admin", name="role", native_enum=False, length=16),
            nullable=False,
        ),
        sa.Column("lookup", sa.String(length=16), nullable=False),
        sa.Column("token_hash", sa.String(length=64), nullable=False),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("revoked_at", sa.DateTime(timezone=True), nullable=True),
        sa.PrimaryKeyConstraint("id"),
        sa.UniqueConstraint("lookup"),
        sa.UniqueConstraint("name"),
    )
    op.create_table(
        "surveys",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("survey", sa.String(length=64), nullable=False),
        sa.Column("title", sa.Text(), nullable=False),
        sa.Column("current_version_id", sa.Integer(), nullable=True),
        sa.Column("current_reference_id", sa.Integer(), nullable=True),
        sa.Column("webhook_secret", sa.String(length=100), nullable=False),
        sa.Column("previous_webhook_secret", sa.String(length=100), nullable=True),
        sa.Column("previous_secret_until", sa.DateTime(timezone=True), nullable=True),
        sa.Column("erasure_salt", sa.String(length=64), nullable=False),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        *_late_keys(sqlite),
        sa.PrimaryKeyConstraint("id"),
        sa.UniqueConstraint("survey"),
    )
    op.create_table(
        "erasures",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("survey_id", sa.Integer(), nullable=False),
        sa.Column("respondent_digest", sa.String(length=64), nullable=False),
        sa.Column("erased_by", sa.String(length=100), nullable=False),
        sa.Column("erased_at", sa.DateTime(timezone=True), nullable=False),
        sa.ForeignKeyConstraint(["survey_id"], ["surveys.id"], ondelete="CASCADE"),
        sa.PrimaryKeyConstraint("id"),
    )
    op.create_table(
        "survey_versions",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("survey_id", sa.Integer(), nullable=False),
        sa.Column("number", sa.Integer(), nullable=False),
        sa.Column("document", sa.JSON(), nullable=False),
        sa.Column("digest", sa.String(length=64), nullable=False),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        sa.ForeignKeyConstraint(["survey_id"], ["surveys.id"], ondelete="CASCADE"),
        sa.PrimaryKeyConstraint("id"),
        sa.UniqueConstraint("survey_id", "number"),
    )
    op.create_table(
        "webhook_deliveries",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("survey_id", sa.Integer(), nullable=False),
        sa.Column("webhook_id", sa.String(length=200), nullable=False),
        sa.Column("received_at", sa.DateTime(timezone=True), nullable=False),
        sa.ForeignKeyConstraint(["survey_id"], ["surveys.id"], ondelete="CASCADE"),
        sa.PrimaryKeyConstraint("id"),
        sa.UniqueConstraint("survey_id", "webhook_id"),
    )
    op.create_index(
        op.f("ix_webhook_deliveries_received_at"),
        "webhook_deliveries",
        ["received_at"],
        unique=False,
    )
    op.create_table(
        "reference_samples",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("survey_version_id", sa.Integer(), nullable=False),
        sa.Column("respondents", sa.Integer(), nullable=False),
        sa.Column("data", sa.JSON(), nullable=False),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        sa.ForeignKeyConstraint(["survey_version_id"], ["survey_versions.id"], ondelete="CASCADE"),
        sa.PrimaryKeyConstraint("id"),
    )
    op.create_index(
        op.f("ix_reference_samples_survey_version_id"),
        "reference_samples",
        ["survey_version_id"],
        unique=False,
    )
    op.create_table(
        "respondents",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("survey_id", sa.Integer(), nullable=False),
        sa.Column("respondent_id", sa.String(length=200), nullable=False),
        sa.Column("survey_version_id", sa.Integer(), nullable=False),
        sa.Column("answers", sa.JSON(), nullable=False),
        sa.Column("answers_digest", sa.String(length=64), nullable=False),
        sa.Column("started_at", sa.DateTime(timezone=True), nullable=True),
        sa.Column("submitted_at", sa.DateTime(timezone=True), nullable=True),
        sa.Column("duration_seconds", sa.Float(), nullable=True),
        sa.Column("meta", sa.JSON(), nullable=True),
        sa.Column("received_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("screened_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("reference_id", sa.Integer(), nullable=True),
        sa.Column("flag_count", sa.SmallInteger(), nullable=False),
        sa.Column("flags", sa.String(length=500), nullable=False),
        sa.Column(
            "review_decision",
            sa.Enum("keep", "exclude", "undecided", name="decision", native_enum=False, length=16),
            nullable=True,
        ),
        sa.ForeignKeyConstraint(["reference_id"], ["reference_samples.id"], ondelete="SET NULL"),
        sa.ForeignKeyConstraint(["survey_id"], ["surveys.id"], ondelete="CASCADE"),
        sa.ForeignKeyConstraint(
            ["survey_version_id"],
            ["survey_versions.id"],
        ),
        sa.PrimaryKeyConstraint("id"),
        sa.UniqueConstraint("survey_id", "respondent_id"),
    )
    op.create_index(
        "ix_respondents_flag_count", "respondents", ["survey_id", "flag_count", "id"], unique=False
    )
    op.create_index(
        "ix_respondents_received", "respondents", ["survey_id", "received_at", "id"], unique=False
    )
    op.create_table(
        "detector_outcomes",
        sa.Column("respondent_pk", sa.Integer(), nullable=False),
        sa.Column("detector", sa.String(length=64), nullable=False),
        sa.Column("detector_version", sa.String(length=32), nullable=False),
        sa.Column("state", sa.SmallInteger(), nullable=False),
        sa.Column("score", sa.Float(), nullable=True),
        sa.Column("cutoff", sa.Float(), nullable=True),
        sa.Column("flagged", sa.Boolean(), nullable=False),
        sa.Column("reason", sa.Text(), nullable=True),
        sa.Column("evidence", sa.JSON(), nullable=False),
        sa.Column("sentence", sa.Text(), nullable=False),
        sa.Column("reference_id", sa.Integer(), nullable=True),
        sa.ForeignKeyConstraint(["reference_id"], ["reference_samples.id"], ondelete="SET NULL"),
        sa.ForeignKeyConstraint(["respondent_pk"], ["respondents.id"], ondelete="CASCADE"),
        sa.PrimaryKeyConstraint("respondent_pk", "detector"),
    )
    op.create_table(
        "response_history",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("respondent_pk", sa.Integer(), nullable=False),
        sa.Column("survey_version_id", sa.Integer(), nullable=False),
        sa.Column("answers", sa.JSON(), nullable=False),
        sa.Column("answers_digest", sa.String(length=64), nullable=False),
        sa.Column("started_at", sa.DateTime(timezone=True), nullable=True),
        sa.Column("submitted_at", sa.DateTime(timezone=True), nullable=True),
        sa.Column("duration_seconds", sa.Float(), nullable=True),
        sa.Column("meta", sa.JSON(), nullable=True),
        sa.Column("received_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("replaced_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("flags", sa.String(length=500), nullable=False),
        sa.ForeignKeyConstraint(["respondent_pk"], ["respondents.id"], ondelete="CASCADE"),
        sa.ForeignKeyConstraint(
            ["survey_version_id"],
            ["survey_versions.id"],
        ),
        sa.PrimaryKeyConstraint("id"),
    )
    op.create_index(
        op.f("ix_response_history_respondent_pk"),
        "response_history",
        ["respondent_pk"],
        unique=False,
    )
    op.create_table(
        "reviews",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("respondent_pk", sa.Integer(), nullable=False),
        sa.Column(
            "decision",
            sa.Enum("keep", "exclude", "undecided", name="decision", native_enum=False, length=16),
            nullable=False,
        ),
        sa.Column("note", sa.Text(), nullable=False),
        sa.Column("reviewer", sa.String(length=100), nullable=False),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        sa.ForeignKeyConstraint(["respondent_pk"], ["respondents.id"], ondelete="CASCADE"),
        sa.PrimaryKeyConstraint("id"),
    )
    op.create_index(op.f("ix_reviews_respondent_pk"), "reviews", ["respondent_pk"], unique=False)
    if not sqlite:
        op.create_foreign_key(
            "fk_surveys_current_version",
            "surveys",
            "survey_versions",
            ["current_version_id"],
            ["id"],
        )
        op.create_foreign_key(
            "fk_surveys_current_reference",
            "surveys",
            "reference_samples",
            ["current_reference_id"],
            ["id"],
        )


def downgrade() -> None:
    if op.get_bind().dialect.name != "sqlite":
        op.drop_constraint("fk_surveys_current_reference", "surveys", type_="foreignkey")
        op.drop_constraint("fk_surveys_current_version", "surveys", type_="foreignkey")
    op.drop_index(op.f("ix_reviews_respondent_pk"), table_name="reviews")
    op.drop_table("reviews")
    op.drop_index(op.f("ix_response_history_respondent_pk"), table_name="response_history")
    op.drop_table("response_history")
    op.drop_table("detector_outcomes")
    op.drop_index("ix_respondents_received", table_name="respondents")
    op.drop_index("ix_respondents_flag_count", table_name="respondents")
    op.drop_table("respondents")
    op.drop_index(op.f("ix_reference_samples_survey_version_id"), table_name="reference_samples")
    op.drop_table("reference_samples")
    op.drop_index(op.f("ix_webhook_deliveries_received_at"), table_name="webhook_deliveries")
    op.drop_table("webhook_deliveries")
    op.drop_table("survey_versions")
    op.drop_table("erasures")
    op.drop_table("surveys")
    op.drop_table("api_keys")

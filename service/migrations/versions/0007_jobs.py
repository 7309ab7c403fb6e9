"""Background jobs: re-screens, reports and exports run outside the request.

Revision ID: 0007
Revises: 0006
Create Date: 2026-12-02
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0007"
down_revision = "0006"
branch_labels = None
depends_on = None


def _choices(name: str, *values: str) -> sa.Enum:
    return sa.Enum(*values, name=name, native_enum=False, length=16)


def upgrade() -> None:
    op.create_table(
        "jobs",
        sa.Column("id", sa.String(32), primary_key=True),
        sa.Column("kind", _choices("job_kind", "rescreen", "report", "export"), nullable=False),
        sa.Column(
            "survey_id", sa.Integer(), sa.ForeignKey("surveys.id", ondelete="CASCADE"),
            nullable=False,
        ),
        sa.Column("options", sa.JSON(), nullable=False),
        sa.Column(
            "state", _choices("job_state", "queued", "running", "done", "failed"), nullable=False
        ),
        sa.Column("progress", sa.Float(), nullable=False),
        sa.Column("message", sa.String(200), nullable=False),
        sa.Column("requested_by", sa.String(100), nullable=False),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("started_at", sa.DateTime(timezone=True), nullable=True),
        sa.Column("finished_at", sa.DateTime(timezone=True), nullable=True),
        sa.Column("heartbeat_at", sa.DateTime(timezone=True), nullable=True),
        sa.Column("worker", sa.String(200), nullable=True),
        sa.Column("attempts", sa.Integer(), nullable=False),
        sa.Column("result_path", sa.Text(), nullable=True),
        sa.Column("result", sa.JSON(none_as_null=True), nullable=True),
        sa.Column("error", sa.Text(), nullable=True),
    )
    op.create_index("ix_jobs_state", "jobs", ["state"])
    op.create_index("ix_jobs_survey_created", "jobs", ["survey_id", "created_at", "id"])


def downgrade() -> None:
    op.drop_index("ix_jobs_survey_created", table_name="jobs")
    op.drop_index("ix_jobs_state", table_name="jobs")
    op.drop_table("jobs")

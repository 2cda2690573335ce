"""initial schema: studies, study_rows, results (the cache)

Revision ID: 0001
Revises:
Create Date: 2025-01-01
"""
import sqlalchemy as sa
from alembic import op

revision = "0001"
down_revision = None
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table(
        "studies",
        sa.Column("id", sa.String(32), primary_key=True),
        sa.Column("owner", sa.String(64), nullable=False),
        sa.Column("status", sa.String(16), nullable=False),
        sa.Column("model_name", sa.String(200), nullable=False),
        sa.Column("request", sa.JSON(), nullable=False),
        sa.Column("request_hash", sa.String(64), nullable=False),
        sa.Column("idempotency_key", sa.String(200), nullable=True),
        sa.Column("total", sa.Integer(), nullable=False),
        sa.Column("done", sa.Integer(), nullable=False),
        sa.Column("created_at", sa.DateTime(), nullable=False),
        sa.Column("updated_at", sa.DateTime(), nullable=False),
        sa.UniqueConstraint("owner", "idempotency_key", name="uq_studies_owner_idempotency"),
    )
    op.create_index("ix_studies_owner", "studies", ["owner"])
    op.create_index("ix_studies_status", "studies", ["status"])
    op.create_index("ix_studies_created_at", "studies", ["created_at"])
    op.create_table(
        "study_rows",
        sa.Column("study_id", sa.String(32), sa.ForeignKey("studies.id", ondelete="CASCADE"), primary_key=True),
        sa.Column("task_index", sa.Integer(), primary_key=True),
        sa.Column("status", sa.String(16), nullable=False),
        sa.Column("cached", sa.Boolean(), nullable=False),
        sa.Column("task_key", sa.String(64), nullable=False),
        sa.Column("task", sa.JSON(), nullable=False),
        sa.Column("row", sa.JSON(), nullable=True),
        sa.Column("seconds", sa.Float(), nullable=True),
        sa.Column("updated_at", sa.DateTime(), nullable=False),
    )
    op.create_index("ix_study_rows_task_key", "study_rows", ["task_key"])
    op.create_table(
        "results",
        sa.Column("task_key", sa.String(64), primary_key=True),
        sa.Column("row", sa.JSON(), nullable=False),
        sa.Column("circuit", sa.LargeBinary(), nullable=True),
        sa.Column("seconds", sa.Float(), nullable=False),
        sa.Column("created_at", sa.DateTime(), nullable=False),
    )


def downgrade() -> None:
    op.drop_table("results")
    op.drop_index("ix_study_rows_task_key", table_name="study_rows")
    op.drop_table("study_rows")
    op.drop_index("ix_studies_created_at", table_name="studies")
    op.drop_index("ix_studies_status", table_name="studies")
    op.drop_index("ix_studies_owner", table_name="studies")
    op.drop_table("studies")

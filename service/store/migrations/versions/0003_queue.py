"""the work queue in the store: leases on study rows, the round-robin clock of studies

Revision ID: 0003
Revises: 0002
Create Date: 2026-12-04

* ``study_rows.lease_owner`` / ``lease_until``: the queue worker holding a pending row and until
  when (a row whose lease has passed is taken again); ``attempts``: how often it was taken.
* ``studies.claimed_at``: when a task of the study was last taken (round-robin order).
"""
import sqlalchemy as sa
from alembic import op

revision = "0003"
down_revision = "0002"
branch_labels = None
depends_on = None


def upgrade() -> None:
    with op.batch_alter_table("study_rows") as batch:
        batch.add_column(sa.Column("lease_owner", sa.String(64), nullable=True))
        batch.add_column(sa.Column("lease_until", sa.DateTime(), nullable=True))
        batch.add_column(sa.Column("attempts", sa.Integer(), nullable=False, server_default="0"))
    op.create_index("ix_study_rows_status", "study_rows", ["status"])
    with op.batch_alter_table("studies") as batch:
        batch.add_column(sa.Column("claimed_at", sa.DateTime(), nullable=True))


def downgrade() -> None:
    with op.batch_alter_table("studies") as batch:
        batch.drop_column("claimed_at")
    op.drop_index("ix_study_rows_status", table_name="study_rows")
    with op.batch_alter_table("study_rows") as batch:
        batch.drop_column("attempts")
        batch.drop_column("lease_until")
        batch.drop_column("lease_owner")

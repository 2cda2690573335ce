"""studies.best_connectivity: the best connectivity of a finished study, for the list

Revision ID: 0002
Revises: 0001
Create Date: 2026-12-02
"""
import sqlalchemy as sa
from alembic import op

revision = "0002"
down_revision = "0001"
branch_labels = None
depends_on = None


def upgrade() -> None:
    with op.batch_alter_table("studies") as batch:
        batch.add_column(sa.Column("best_connectivity", sa.String(200), nullable=True))


def downgrade() -> None:
    with op.batch_alter_table("studies") as batch:
        batch.drop_column("best_connectivity")

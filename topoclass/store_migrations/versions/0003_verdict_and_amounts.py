"""The verdict of the review band, and the physical amounts of each result (one row each).

Revision ID: 0003
Revises: 0002
"""

import sqlalchemy as sa
from alembic import op

revision = "0003"
down_revision = "0002"
branch_labels = None
depends_on = None


def upgrade() -> None:
    with op.batch_alter_table("results") as batch:
        batch.add_column(sa.Column("verdict", sa.String(255)))
    op.create_table(
        "amounts",
        sa.Column("result_id", sa.Integer, sa.ForeignKey("results.id"), primary_key=True),
        sa.Column("name", sa.String(64), primary_key=True),
        sa.Column("value", sa.Float, nullable=False),
    )

"""Index results by scoring time, for exports and trends since a date.

Revision ID: 0002
Revises: 0001
"""

from alembic import op

revision = "0002"
down_revision = "0001"
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_index("ix_results_scored_utc", "results", ["scored_utc"])

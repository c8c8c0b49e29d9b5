"""Batches, images, results and class probabilities.

Revision ID: 0001
Revises:
"""

import sqlalchemy as sa
from alembic import op

revision = "0001"
down_revision = None
branch_labels = None
depends_on = None

_MEASURES = ("spacing_px", "h0_length_variance", "h1_length_sum", "psi6_global",
             "psi6_local_mean", "defect_fraction", "clark_evans_r", "nn_cv")


def upgrade() -> None:
    op.create_table(
        "batches",
        sa.Column("id", sa.Integer, primary_key=True, autoincrement=True),
        sa.Column("started_utc", sa.DateTime(timezone=True), nullable=False),
        sa.Column("finished_utc", sa.DateTime(timezone=True)),
        sa.Column("host", sa.String(255), nullable=False),
        sa.Column("operator", sa.String(255), nullable=False),
        sa.Column("note", sa.Text, nullable=False),
        sa.Column("model_sha256", sa.String(64), nullable=False, index=True),
        sa.Column("model_path", sa.Text, nullable=False),
        sa.Column("classes", sa.Text, nullable=False),
        sa.Column("settings", sa.Text, nullable=False),
        sa.Column("settings_key", sa.String(64), nullable=False),
        sa.Column("topoclass_version", sa.String(64), nullable=False),
        sa.Column("output_csv", sa.Text, nullable=False),
        sa.Column("n_images", sa.Integer, nullable=False),
        sa.Column("n_scored", sa.Integer),
        sa.Column("n_failed", sa.Integer),
        sa.Column("n_skipped", sa.Integer),
    )
    op.create_table(
        "images",
        sa.Column("id", sa.Integer, primary_key=True, autoincrement=True),
        sa.Column("sha256", sa.String(64), nullable=False, unique=True),
        sa.Column("size_bytes", sa.BigInteger),
        sa.Column("first_seen_utc", sa.DateTime(timezone=True), nullable=False),
    )
    op.create_table(
        "results",
        sa.Column("id", sa.Integer, primary_key=True, autoincrement=True),
        sa.Column("batch_id", sa.Integer, sa.ForeignKey("batches.id"), nullable=False,
                  index=True),
        sa.Column("image_id", sa.Integer, sa.ForeignKey("images.id"), index=True),
        sa.Column("path", sa.Text, nullable=False),
        sa.Column("model_sha256", sa.String(64), nullable=False),
        sa.Column("settings_key", sa.String(64), nullable=False),
        sa.Column("run", sa.Integer, nullable=False),
        sa.Column("scored_utc", sa.DateTime(timezone=True), nullable=False),
        sa.Column("status", sa.String(16), nullable=False),
        sa.Column("predicted", sa.String(255)),
        sa.Column("confidence", sa.Float),
        sa.Column("unfamiliar", sa.Boolean),
        sa.Column("n_sites", sa.Integer),
        sa.Column("h1_count", sa.Integer),
        *[sa.Column(name, sa.Float) for name in _MEASURES],
        sa.Column("extra", sa.Text),
        sa.Column("message", sa.Text, nullable=False),
        sa.UniqueConstraint("image_id", "model_sha256", "settings_key", "run",
                            name="uq_results_image_model_settings_run"),
    )
    op.create_table(
        "probabilities",
        sa.Column("result_id", sa.Integer, sa.ForeignKey("results.id"), primary_key=True),
        sa.Column("class_name", sa.String(255), primary_key=True),
        sa.Column("probability", sa.Float, nullable=False),
    )

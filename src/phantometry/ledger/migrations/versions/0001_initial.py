"""Initial ledger schema: sites, scanners, analyses, measurements.

Revision ID: 0001
Revises:
Create Date: 2026-11-20
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0001"
down_revision = None
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table(
        "phantometry_sites",
        sa.Column("id", sa.Integer, nullable=False),
        sa.Column("name", sa.String(200), nullable=False),
        sa.PrimaryKeyConstraint("id", name="pk_phantometry_sites"),
        sa.UniqueConstraint("name", name="uq_phantometry_sites_name"),
    )
    op.create_table(
        "phantometry_scanners",
        sa.Column("id", sa.Integer, nullable=False),
        sa.Column("site_id", sa.Integer, nullable=False),
        sa.Column("name", sa.String(200), nullable=False),
        sa.Column("manufacturer", sa.String(200)),
        sa.Column("model", sa.String(200)),
        sa.Column("serial", sa.String(200)),
        sa.PrimaryKeyConstraint("id", name="pk_phantometry_scanners"),
        sa.ForeignKeyConstraint(["site_id"], ["phantometry_sites.id"], name="fk_phantometry_scanners_site_id"),
        sa.UniqueConstraint("site_id", "name", name="uq_phantometry_scanners_site_id_name"),
    )
    op.create_table(
        "phantometry_analyses",
        sa.Column("id", sa.Integer, nullable=False),
        sa.Column("uid", sa.String(36), nullable=False),
        sa.Column("record_key", sa.String(64), nullable=False),
        sa.Column("series_uid", sa.String(64)),
        sa.Column("template", sa.String(200), nullable=False),
        sa.Column("acquired_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("recorded_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("scanner_id", sa.Integer, nullable=False),
        sa.Column("protocol", sa.String(200), nullable=False),
        sa.Column("reconstruction", sa.String(500)),
        sa.Column("nuclide", sa.String(16)),
        sa.Column("fill_record", sa.JSON),
        sa.Column("settings_hash", sa.String(64), nullable=False),
        sa.Column("tool_version", sa.String(64), nullable=False),
        sa.PrimaryKeyConstraint("id", name="pk_phantometry_analyses"),
        sa.ForeignKeyConstraint(["scanner_id"], ["phantometry_scanners.id"], name="fk_phantometry_analyses_scanner_id"),
        sa.UniqueConstraint("uid", name="uq_phantometry_analyses_uid"),
        sa.UniqueConstraint("record_key", name="uq_phantometry_analyses_record_key"),
    )
    op.create_index("ix_phantometry_analyses_trend", "phantometry_analyses", ["scanner_id", "protocol", "acquired_at"])
    op.create_index("ix_phantometry_analyses_recorded_at", "phantometry_analyses", ["recorded_at"])
    op.create_index("ix_phantometry_analyses_acquired_at", "phantometry_analyses", ["acquired_at"])
    op.create_table(
        "phantometry_measurements",
        sa.Column("id", sa.Integer, nullable=False),
        sa.Column("analysis_id", sa.Integer, nullable=False),
        sa.Column("roi", sa.String(100), nullable=False),
        sa.Column("metric", sa.String(100), nullable=False),
        sa.Column("value", sa.Double),
        sa.Column("unit", sa.String(32), nullable=False),
        sa.Column("uncertainty", sa.Double),
        sa.Column("band", sa.String(200)),
        sa.Column("band_low", sa.Double),
        sa.Column("band_high", sa.Double),
        sa.Column("verdict", sa.String(16)),
        sa.Column("note", sa.Text),
        sa.PrimaryKeyConstraint("id", name="pk_phantometry_measurements"),
        sa.ForeignKeyConstraint(
            ["analysis_id"], ["phantometry_analyses.id"], name="fk_phantometry_measurements_analysis_id", ondelete="CASCADE"
        ),
        sa.UniqueConstraint("analysis_id", "roi", "metric", name="uq_phantometry_measurements_analysis_id_roi_metric"),
    )


def downgrade() -> None:
    op.drop_table("phantometry_measurements")
    op.drop_index("ix_phantometry_analyses_acquired_at", table_name="phantometry_analyses")
    op.drop_index("ix_phantometry_analyses_recorded_at", table_name="phantometry_analyses")
    op.drop_index("ix_phantometry_analyses_trend", table_name="phantometry_analyses")
    op.drop_table("phantometry_analyses")
    op.drop_table("phantometry_scanners")
    op.drop_table("phantometry_sites")

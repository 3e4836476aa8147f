"""Baselines (control-limit reference sets) and the analysis-level verdict.

Adds ``phantometry_baselines`` and ``phantometry_baseline_members``, and the column
``phantometry_analyses.verdict`` (the worst verdict of an analysis's measurements: ``fail``
over ``pass`` over ``n/a``), back-filled from the measurements already stored.

Revision ID: 0002
Revises: 0001
Create Date: 2026-11-20
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0002"
down_revision = "0001"
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table(
        "phantometry_baselines",
        sa.Column("id", sa.Integer, nullable=False),
        sa.Column("scanner_id", sa.Integer, nullable=False),
        sa.Column("protocol", sa.String(200), nullable=False),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("note", sa.Text),
        sa.PrimaryKeyConstraint("id", name="pk_phantometry_baselines"),
        sa.ForeignKeyConstraint(["scanner_id"], ["phantometry_scanners.id"], name="fk_phantometry_baselines_scanner_id"),
    )
    op.create_index("ix_phantometry_baselines_current", "phantometry_baselines", ["scanner_id", "protocol", "created_at"])
    op.create_table(
        "phantometry_baseline_members",
        sa.Column("baseline_id", sa.Integer, nullable=False),
        sa.Column("analysis_id", sa.Integer, nullable=False),
        sa.PrimaryKeyConstraint("baseline_id", "analysis_id", name="pk_phantometry_baseline_members"),
        sa.ForeignKeyConstraint(
            ["baseline_id"], ["phantometry_baselines.id"], name="fk_phantometry_baseline_members_baseline_id", ondelete="CASCADE"
        ),
        sa.ForeignKeyConstraint(
            ["analysis_id"], ["phantometry_analyses.id"], name="fk_phantometry_baseline_members_analysis_id", ondelete="CASCADE"
        ),
    )
    op.add_column("phantometry_analyses", sa.Column("verdict", sa.String(16)))
    # back-fill: the worst verdict of each analysis's measurements (fail > pass > n/a)
    m = sa.table("phantometry_measurements", sa.column("analysis_id"), sa.column("verdict"))
    a = sa.table("phantometry_analyses", sa.column("id"), sa.column("verdict"))

    def has(verdict: str):
        return sa.exists().where(m.c.analysis_id == a.c.id, m.c.verdict == verdict)

    op.execute(
        a.update().values(
            verdict=sa.case((has("fail"), "fail"), (has("pass"), "pass"), (has("n/a"), "n/a"), else_=sa.null())
        )
    )


def downgrade() -> None:
    with op.batch_alter_table("phantometry_analyses") as batch:
        batch.drop_column("verdict")
    op.drop_table("phantometry_baseline_members")
    op.drop_index("ix_phantometry_baselines_current", table_name="phantometry_baselines")
    op.drop_table("phantometry_baselines")

"""built priors and the entry revisions they use

Revision ID: 0002
Revises: 0001
Create Date: 2026-12-01
"""

import sqlalchemy as sa
from alembic import op

revision = "0002"
down_revision = "0001"
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table(
        "prior_versions",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("name", sa.String(length=200), nullable=False),
        sa.Column("version", sa.Integer(), nullable=False),
        sa.Column("digest", sa.String(length=64), nullable=False),
        sa.Column("definition", sa.JSON(), nullable=False),
        sa.Column("result", sa.JSON(), nullable=False),
        sa.Column("software_version", sa.String(length=40), nullable=False),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_prior_versions")),
        sa.UniqueConstraint("name", "version", name=op.f("uq_prior_versions_name")),
    )
    with op.batch_alter_table("prior_versions", schema=None) as batch_op:
        batch_op.create_index(batch_op.f("ix_prior_versions_name"), ["name"], unique=False)

    op.create_table(
        "prior_entries",
        sa.Column("prior_id", sa.Integer(), nullable=False),
        sa.Column("position", sa.Integer(), nullable=False),
        sa.Column("revision_id", sa.Integer(), nullable=False),
        sa.Column("weight", sa.Float(), nullable=False),
        sa.Column("ratings", sa.JSON(), nullable=False),
        sa.Column("discount", sa.JSON(), nullable=False),
        sa.ForeignKeyConstraint(
            ["prior_id"],
            ["prior_versions.id"],
            name=op.f("fk_prior_entries_prior_id_prior_versions"),
        ),
        sa.ForeignKeyConstraint(
            ["revision_id"],
            ["entry_revisions.id"],
            name=op.f("fk_prior_entries_revision_id_entry_revisions"),
        ),
        sa.PrimaryKeyConstraint("prior_id", "position", name=op.f("pk_prior_entries")),
    )


def downgrade() -> None:
    op.drop_table("prior_entries")
    with op.batch_alter_table("prior_versions", schema=None) as batch_op:
        batch_op.drop_index(batch_op.f("ix_prior_versions_name"))

    op.drop_table("prior_versions")

"""sources, studies, entries with revisions and tags

Revision ID: 0001
Revises:
Create Date: 2026-12-01
"""

import sqlalchemy as sa
from alembic import op

revision = "0001"
down_revision = None
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table(
        "imports",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("kind", sa.String(length=20), nullable=False),
        sa.Column("path", sa.Text(), nullable=False),
        sa.Column("sha256", sa.String(length=64), nullable=False),
        sa.Column("added", sa.Integer(), nullable=False),
        sa.Column("skipped", sa.Integer(), nullable=False),
        sa.Column("imported_at", sa.DateTime(timezone=True), nullable=False),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_imports")),
    )
    op.create_table(
        "sources",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("key", sa.String(length=200), nullable=False),
        sa.Column("citation", sa.Text(), nullable=True),
        sa.Column("title", sa.Text(), nullable=True),
        sa.Column("authors", sa.Text(), nullable=True),
        sa.Column("journal", sa.Text(), nullable=True),
        sa.Column("doi", sa.String(length=300), nullable=True),
        sa.Column("year", sa.Integer(), nullable=True),
        sa.Column("retracted", sa.Boolean(), nullable=False),
        sa.Column("retraction_reason", sa.Text(), nullable=True),
        sa.Column("retracted_at", sa.DateTime(timezone=True), nullable=True),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_sources")),
        sa.UniqueConstraint("key", name=op.f("uq_sources_key")),
    )
    op.create_table(
        "studies",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("key", sa.String(length=200), nullable=False),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_studies")),
        sa.UniqueConstraint("key", name=op.f("uq_studies_key")),
    )
    op.create_table(
        "entries",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("fingerprint", sa.String(length=64), nullable=False),
        sa.Column("import_id", sa.Integer(), nullable=True),
        sa.Column("row", sa.Integer(), nullable=True),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        sa.ForeignKeyConstraint(
            ["import_id"], ["imports.id"], name=op.f("fk_entries_import_id_imports")
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_entries")),
        sa.UniqueConstraint("fingerprint", name=op.f("uq_entries_fingerprint")),
    )
    op.create_table(
        "entry_revisions",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("entry_id", sa.Integer(), nullable=False),
        sa.Column("revision", sa.Integer(), nullable=False),
        sa.Column("source_id", sa.Integer(), nullable=False),
        sa.Column("study_id", sa.Integer(), nullable=False),
        sa.Column("quantity", sa.String(length=200), nullable=False),
        sa.Column("measure", sa.String(length=40), nullable=False),
        sa.Column("reported", sa.JSON(), nullable=False),
        sa.Column("y", sa.Float(), nullable=False),
        sa.Column("se", sa.Float(), nullable=False),
        sa.Column("scale", sa.String(length=20), nullable=False),
        sa.Column("conversion", sa.String(length=80), nullable=False),
        sa.Column("corrections", sa.JSON(), nullable=False),
        sa.Column("context", sa.JSON(), nullable=False),
        sa.Column("extra", sa.JSON(), nullable=False),
        sa.Column("reason", sa.Text(), nullable=False),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        sa.ForeignKeyConstraint(
            ["entry_id"], ["entries.id"], name=op.f("fk_entry_revisions_entry_id_entries")
        ),
        sa.ForeignKeyConstraint(
            ["source_id"], ["sources.id"], name=op.f("fk_entry_revisions_source_id_sources")
        ),
        sa.ForeignKeyConstraint(
            ["study_id"], ["studies.id"], name=op.f("fk_entry_revisions_study_id_studies")
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_entry_revisions")),
        sa.UniqueConstraint("entry_id", "revision", name=op.f("uq_entry_revisions_entry_id")),
    )
    with op.batch_alter_table("entry_revisions", schema=None) as batch_op:
        batch_op.create_index(batch_op.f("ix_entry_revisions_measure"), ["measure"], unique=False)
        batch_op.create_index(batch_op.f("ix_entry_revisions_quantity"), ["quantity"], unique=False)

    op.create_table(
        "entry_tags",
        sa.Column("revision_id", sa.Integer(), nullable=False),
        sa.Column("tag", sa.String(length=100), nullable=False),
        sa.ForeignKeyConstraint(
            ["revision_id"],
            ["entry_revisions.id"],
            name=op.f("fk_entry_tags_revision_id_entry_revisions"),
        ),
        sa.PrimaryKeyConstraint("revision_id", "tag", name=op.f("pk_entry_tags")),
    )
    with op.batch_alter_table("entry_tags", schema=None) as batch_op:
        batch_op.create_index("ix_entry_tags_tag", ["tag"], unique=False)


def downgrade() -> None:
    with op.batch_alter_table("entry_tags", schema=None) as batch_op:
        batch_op.drop_index("ix_entry_tags_tag")

    op.drop_table("entry_tags")
    with op.batch_alter_table("entry_revisions", schema=None) as batch_op:
        batch_op.drop_index(batch_op.f("ix_entry_revisions_quantity"))
        batch_op.drop_index(batch_op.f("ix_entry_revisions_measure"))

    op.drop_table("entry_revisions")
    op.drop_table("entries")
    op.drop_table("studies")
    op.drop_table("sources")
    op.drop_table("imports")

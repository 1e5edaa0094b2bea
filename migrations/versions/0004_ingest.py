"""row identity by parsed values, curator row keys, revisions of source metadata

Revision ID: 0004
Revises: 0003
Create Date: 2026-12-02

Each entry revision gets `identity`: the hash of its canonical numbers with its source,
study, quantity and measure (`registry.evidence.sheets.identity`), computed here for every
stored revision from what it stored; imports look rows up by it, so a registry imported
before this migration recognises its rows when they come again, in any spreadsheet's
notation. `entries.fingerprint` (the hash of the cells as first imported) is left as
stored. `entries.row_key` holds a curator's stable key for a sheet row; `source_revisions`
keeps every earlier version of a source's metadata.
"""

import sqlalchemy as sa
from alembic import op

from registry.evidence.sheets import canonical, identity, parse_number

revision = "0004"
down_revision = "0003"
branch_labels = None
depends_on = None


_revisions = sa.table(
    "entry_revisions",
    sa.column("id", sa.Integer),
    sa.column("source_id", sa.Integer),
    sa.column("study_id", sa.Integer),
    sa.column("quantity", sa.String),
    sa.column("measure", sa.String),
    sa.column("reported", sa.JSON),
    sa.column("identity", sa.String),
)
_keys = {name: sa.table(name, sa.column("id", sa.Integer), sa.column("key", sa.String))
         for name in ("sources", "studies")}  # fmt: skip


def _fill_identities() -> None:
    r, source, study = _revisions, _keys["sources"], _keys["studies"]
    connection = op.get_bind()
    rows = connection.execute(
        sa.select(r.c.id, source.c.key, study.c.key, r.c.quantity, r.c.measure, r.c.reported)
        .join(source, source.c.id == r.c.source_id)
        .join(study, study.c.id == r.c.study_id)
    ).all()
    for rev_id, source_key, study_key, quantity, measure, reported in rows:
        numbers = {k: canonical(*parse_number(v, k, measure)) for k, v in reported.items()}
        connection.execute(
            sa.update(r)
            .where(r.c.id == rev_id)
            .values(identity=identity(source_key, study_key, quantity, measure, numbers))
        )


def upgrade() -> None:
    # Plain ADD COLUMN and indexes: SQLite's batch mode would copy `entries` and
    # `entry_revisions`, which other tables refer to, and the foreign keys refuse that.
    op.add_column("entries", sa.Column("row_key", sa.String(length=200), nullable=True))
    op.create_index(op.f("ix_entries_row_key"), "entries", ["row_key"], unique=True)
    op.add_column("entry_revisions", sa.Column("identity", sa.String(length=64), nullable=True))
    _fill_identities()
    op.create_index(
        op.f("ix_entry_revisions_identity"), "entry_revisions", ["identity"], unique=False
    )
    op.create_table(
        "source_revisions",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("source_id", sa.Integer(), nullable=False),
        sa.Column("revision", sa.Integer(), nullable=False),
        sa.Column("fields", sa.JSON(), nullable=False),
        sa.Column("reason", sa.Text(), nullable=False),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("created_by", sa.String(length=200), nullable=True),
        sa.ForeignKeyConstraint(
            ["source_id"], ["sources.id"], name=op.f("fk_source_revisions_source_id_sources")
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_source_revisions")),
        sa.UniqueConstraint("source_id", "revision", name=op.f("uq_source_revisions_source_id")),
    )


def downgrade() -> None:
    # Plain DROP COLUMN (SQLite 3.35+), for the same reason as in upgrade.
    op.drop_table("source_revisions")
    op.drop_index(op.f("ix_entry_revisions_identity"), table_name="entry_revisions")
    op.drop_column("entry_revisions", "identity")
    op.drop_index(op.f("ix_entries_row_key"), table_name="entries")
    op.drop_column("entries", "row_key")

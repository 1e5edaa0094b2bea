"""indexes that the listings and look-ups of a large registry use

Revision ID: 0005
Revises: 0004
Create Date: 2026-12-02

Each index serves one query of `registry.storage.ledger` (checked by
tests/test_query_plans.py with EXPLAIN QUERY PLAN): entries of a quantity in id order,
entries of a tag, and the entry count of a source.
"""

from alembic import op

revision = "0005"
down_revision = "0004"
branch_labels = None
depends_on = None

INDEXES = {
    "ix_entry_revisions_quantity_entry": (
        "entry_revisions",
        ["quantity", "entry_id", "revision"],
    ),
    "ix_entry_revisions_source_entry": ("entry_revisions", ["source_id", "entry_id"]),
    "ix_entry_tags_tag_revision": ("entry_tags", ["tag", "revision_id"]),
}


def upgrade() -> None:
    for name, (table, columns) in INDEXES.items():
        op.create_index(name, table, columns, unique=False)


def downgrade() -> None:
    for name, (table, _columns) in INDEXES.items():
        op.drop_index(name, table_name=table)

"""who wrote each record: the user behind imports, revisions, retractions and builds

Revision ID: 0003
Revises: 0002
Create Date: 2026-12-02

Nullable, because records written before this revision have no user recorded; the time of
every write was already kept (`created_at`, `imported_at`, `retracted_at`).
"""

import sqlalchemy as sa
from alembic import op

revision = "0003"
down_revision = "0002"
branch_labels = None
depends_on = None

# table -> columns added to it
COLUMNS = {
    "sources": ("created_by", "retracted_by"),
    "imports": ("created_by",),
    "entry_revisions": ("created_by",),
    "prior_versions": ("created_by",),
}


# Plain ALTER TABLE (no batch mode): batch mode copies a table, which SQLite's foreign keys
# refuse for tables that others refer to (sources, entry_revisions, prior_versions).
def upgrade() -> None:
    for table, columns in COLUMNS.items():
        for column in columns:
            op.add_column(table, sa.Column(column, sa.String(length=200), nullable=True))


def downgrade() -> None:
    for table, columns in COLUMNS.items():
        for column in columns:
            op.drop_column(table, column)

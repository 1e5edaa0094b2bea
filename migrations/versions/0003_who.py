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


def upgrade() -> None:
    for table, columns in COLUMNS.items():
        with op.batch_alter_table(table, schema=None) as batch_op:
            for column in columns:
                batch_op.add_column(sa.Column(column, sa.String(length=200), nullable=True))


def downgrade() -> None:
    for table, columns in COLUMNS.items():
        with op.batch_alter_table(table, schema=None) as batch_op:
            for column in columns:
                batch_op.drop_column(column)

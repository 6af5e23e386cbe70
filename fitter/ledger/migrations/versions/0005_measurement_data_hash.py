"""each measurement's data hash, to find the same points stored under another tube

Revision ID: 0005_measurement_data_hash
Revises: 0004_plot_images
Create Date: 2026-12-02 21:40:00
"""
import hashlib

from alembic import op
import sqlalchemy as sa


revision = '0005_measurement_data_hash'
down_revision = '0004_plot_images'
branch_labels = None
depends_on = None


def upgrade() -> None:
    # written to match fitter/ledger/schema.py:Measurement.data_sha256; tests/ledger/test_ledger_db.py
    # compares them
    with op.batch_alter_table('measurements', schema=None) as batch_op:
        batch_op.add_column(sa.Column('data_sha256', sa.String(length=64), nullable=True))
        batch_op.create_index(batch_op.f('ix_measurements_data_sha256'), ['data_sha256'], unique=False)
    # the stored measurements' hashes, as fitter/ledger/schema.py:data_hash computes them (the
    # first four of the five float64 arrays of the points), a batch at a time
    conn = op.get_bind()
    m = sa.table('measurements', sa.column('id', sa.Integer()), sa.column('n_points', sa.Integer()),
                 sa.column('points', sa.LargeBinary()), sa.column('data_sha256', sa.String(64)))
    last = 0
    while True:
        rows = conn.execute(sa.select(m.c.id, m.c.n_points, m.c.points).where(m.c.id > last)
                            .order_by(m.c.id).limit(500)).all()
        if not rows:
            break
        conn.execute(m.update().where(m.c.id == sa.bindparam('mid')).values(data_sha256=sa.bindparam('h')),
                     [{'mid': i, 'h': hashlib.sha256(bytes(p)[:32 * n]).hexdigest()} for i, n, p in rows])
        last = rows[-1][0]


def downgrade() -> None:
    # a plain ALTER TABLE ... DROP COLUMN (SQLite 3.35+, PostgreSQL): a batch operation would
    # copy the table, whose DROP the fits' foreign keys refuse on SQLite
    op.drop_index(op.f('ix_measurements_data_sha256'), table_name='measurements')
    op.drop_column('measurements', 'data_sha256')

"""datasheet plots being digitised, with the work in progress

Revision ID: 0004_plot_images
Revises: 0003_upload_jobs
Create Date: 2026-12-02 17:20:00
"""
from alembic import op
import sqlalchemy as sa


revision = '0004_plot_images'
down_revision = '0003_upload_jobs'
branch_labels = None
depends_on = None


def upgrade() -> None:
    # written to match fitter/ledger/schema.py:PlotImageRow; tests/ledger/test_ledger_db.py compares them
    op.create_table('plot_images',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('name', sa.Text(), nullable=False),
    sa.Column('sha256', sa.String(length=64), nullable=False),
    sa.Column('format', sa.String(length=8), nullable=False),
    sa.Column('width', sa.Integer(), nullable=False),
    sa.Column('height', sa.Integer(), nullable=False),
    sa.Column('content', sa.LargeBinary(), nullable=False),
    sa.Column('uploaded_at', sa.String(length=40), nullable=False),
    sa.Column('uploaded_by', sa.String(length=64), nullable=False),
    sa.Column('updated_at', sa.String(length=40), nullable=False),
    sa.Column('state', sa.JSON(), nullable=False),
    sa.Column('measurement_ids', sa.JSON(), nullable=False),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_plot_images'))
    )
    with op.batch_alter_table('plot_images', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_plot_images_sha256'), ['sha256'], unique=False)


def downgrade() -> None:
    with op.batch_alter_table('plot_images', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_plot_images_sha256'))
    op.drop_table('plot_images')

"""background upload jobs of the web front end

Revision ID: 0003_upload_jobs
Revises: 0002_accounts
Create Date: 2026-12-02 15:25:00
"""
from alembic import op
import sqlalchemy as sa


revision = '0003_upload_jobs'
down_revision = '0002_accounts'
branch_labels = None
depends_on = None


def upgrade() -> None:
    # written to match fitter/ledger/jobs.py; tests/ledger/test_ledger_db.py compares them
    op.create_table('upload_jobs',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('account', sa.String(length=64), nullable=False),
    sa.Column('state', sa.String(length=16), nullable=False),
    sa.Column('tube_type', sa.String(length=64), nullable=False),
    sa.Column('model', sa.String(length=32), nullable=False),
    sa.Column('instrument', sa.Text(), nullable=False),
    sa.Column('notes', sa.Text(), nullable=False),
    sa.Column('files_total', sa.Integer(), nullable=False),
    sa.Column('files_done', sa.Integer(), nullable=False),
    sa.Column('payload', sa.LargeBinary(), nullable=True),
    sa.Column('message', sa.Text(), nullable=False),
    sa.Column('result', sa.JSON(), nullable=True),
    sa.Column('created_at', sa.String(length=40), nullable=False),
    sa.Column('updated_at', sa.String(length=40), nullable=False),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_upload_jobs'))
    )
    with op.batch_alter_table('upload_jobs', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_upload_jobs_state'), ['state'], unique=False)


def downgrade() -> None:
    with op.batch_alter_table('upload_jobs', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_upload_jobs_state'))
    op.drop_table('upload_jobs')

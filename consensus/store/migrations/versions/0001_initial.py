"""the store of consensus 0.2: journal, blobs, runs as packed frames

Revision ID: 0001
Revises: 
Create Date: 2026-12-02
"""
from alembic import op
import sqlalchemy as sa
import sqlmodel


revision = '0001'
down_revision = None
branch_labels = None
depends_on = None


def upgrade() -> None:

    op.create_table('blob',
    sa.Column('sha256', sqlmodel.sql.sqltypes.AutoString(), nullable=False),
    sa.Column('encoding', sqlmodel.sql.sqltypes.AutoString(), nullable=False),
    sa.Column('size', sa.Integer(), nullable=False),
    sa.Column('content', sa.LargeBinary(), nullable=False),
    sa.PrimaryKeyConstraint('sha256')
    )
    op.create_table('cacheentry',
    sa.Column('key', sqlmodel.sql.sqltypes.AutoString(), nullable=False),
    sa.Column('kind', sqlmodel.sql.sqltypes.AutoString(), nullable=False),
    sa.Column('cycle', sqlmodel.sql.sqltypes.AutoString(), nullable=False),
    sa.Column('created_at', sqlmodel.sql.sqltypes.UTCDateTime(), nullable=False),
    sa.Column('content', sa.LargeBinary(), nullable=False),
    sa.PrimaryKeyConstraint('key')
    )
    with op.batch_alter_table('cacheentry', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_cacheentry_kind'), ['kind'], unique=False)

    op.create_table('cycle',
    sa.Column('name', sqlmodel.sql.sqltypes.AutoString(), nullable=False),
    sa.Column('horizon', sa.Integer(), nullable=False),
    sa.Column('due', sa.Date(), nullable=True),
    sa.Column('revision', sa.Integer(), nullable=False),
    sa.Column('status', sqlmodel.sql.sqltypes.AutoString(), nullable=False),
    sa.Column('opened_at', sqlmodel.sql.sqltypes.UTCDateTime(), nullable=False),
    sa.Column('opened_by', sqlmodel.sql.sqltypes.AutoString(), nullable=False),
    sa.Column('opened_seq', sa.Integer(), nullable=True),
    sa.Column('allow_missing_history', sa.Boolean(), nullable=False),
    sa.PrimaryKeyConstraint('name')
    )
    op.create_table('journalentry',
    sa.Column('seq', sa.Integer(), nullable=False),
    sa.Column('at', sqlmodel.sql.sqltypes.UTCDateTime(), nullable=False),
    sa.Column('kind', sqlmodel.sql.sqltypes.AutoString(), nullable=False),
    sa.Column('ref_id', sqlmodel.sql.sqltypes.AutoString(), nullable=False),
    sa.Column('cycle', sqlmodel.sql.sqltypes.AutoString(), nullable=True),
    sa.Column('digest', sqlmodel.sql.sqltypes.AutoString(), nullable=False),
    sa.Column('chain', sqlmodel.sql.sqltypes.AutoString(), nullable=False),
    sa.PrimaryKeyConstraint('seq'),
    sa.UniqueConstraint('kind', 'ref_id', name='uq_journal_record')
    )
    with op.batch_alter_table('journalentry', schema=None) as batch_op:
        batch_op.create_index('ix_journal_cycle', ['cycle'], unique=False)

    op.create_table('setting',
    sa.Column('key', sqlmodel.sql.sqltypes.AutoString(), nullable=False),
    sa.Column('value', sqlmodel.sql.sqltypes.AutoString(), nullable=False),
    sa.PrimaryKeyConstraint('key')
    )
    op.create_table('submission',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('seq', sa.Integer(), nullable=True),
    sa.Column('kind', sqlmodel.sql.sqltypes.AutoString(), nullable=False),
    sa.Column('source', sqlmodel.sql.sqltypes.AutoString(), nullable=True),
    sa.Column('cycle', sqlmodel.sql.sqltypes.AutoString(), nullable=True),
    sa.Column('revision', sa.Integer(), nullable=True),
    sa.Column('scope', sqlmodel.sql.sqltypes.AutoString(), nullable=False),
    sa.Column('scope_detail', sa.JSON(), nullable=True),
    sa.Column('replace', sa.Boolean(), nullable=False),
    sa.Column('filename', sqlmodel.sql.sqltypes.AutoString(), nullable=False),
    sa.Column('sha256', sqlmodel.sql.sqltypes.AutoString(), nullable=False),
    sa.Column('lines_sha256', sqlmodel.sql.sqltypes.AutoString(), nullable=True),
    sa.Column('submitted_by', sqlmodel.sql.sqltypes.AutoString(), nullable=False),
    sa.Column('submitted_at', sqlmodel.sql.sqltypes.UTCDateTime(), nullable=False),
    sa.Column('status', sqlmodel.sql.sqltypes.AutoString(), nullable=False),
    sa.Column('reinstates', sa.Integer(), nullable=True),
    sa.Column('late', sa.Boolean(), nullable=False),
    sa.Column('reasons', sa.JSON(), nullable=True),
    sa.Column('row_count', sa.Integer(), nullable=False),
    sa.Column('grain', sqlmodel.sql.sqltypes.AutoString(), nullable=False),
    sa.Column('file_format', sa.JSON(), nullable=True),
    sa.Column('months', sa.JSON(), nullable=True),
    sa.PrimaryKeyConstraint('id')
    )
    with op.batch_alter_table('submission', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_submission_cycle'), ['cycle'], unique=False)
        batch_op.create_index(batch_op.f('ix_submission_seq'), ['seq'], unique=False)
        batch_op.create_index(batch_op.f('ix_submission_sha256'), ['sha256'], unique=False)
        batch_op.create_index(batch_op.f('ix_submission_source'), ['source'], unique=False)

    op.create_table('consensusrun',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('cycle', sqlmodel.sql.sqltypes.AutoString(), nullable=False),
    sa.Column('revision', sa.Integer(), nullable=False),
    sa.Column('created_at', sqlmodel.sql.sqltypes.UTCDateTime(), nullable=False),
    sa.Column('created_by', sqlmodel.sql.sqltypes.AutoString(), nullable=False),
    sa.Column('status', sqlmodel.sql.sqltypes.AutoString(), nullable=False),
    sa.Column('spec', sa.JSON(), nullable=True),
    sa.Column('through_seq', sa.Integer(), nullable=False),
    sa.Column('inputs_digest', sqlmodel.sql.sqltypes.AutoString(), nullable=False),
    sa.Column('method_version', sqlmodel.sql.sqltypes.AutoString(), nullable=False),
    sa.Column('inputs', sa.JSON(), nullable=True),
    sa.Column('summary', sa.JSON(), nullable=True),
    sa.Column('parts', sa.JSON(), nullable=True),
    sa.Column('notes', sa.JSON(), nullable=True),
    sa.ForeignKeyConstraint(['cycle'], ['cycle.name'], ),
    sa.PrimaryKeyConstraint('id')
    )
    with op.batch_alter_table('consensusrun', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_consensusrun_cycle'), ['cycle'], unique=False)

    op.create_table('cyclerevision',
    sa.Column('cycle', sqlmodel.sql.sqltypes.AutoString(), nullable=False),
    sa.Column('revision', sa.Integer(), nullable=False),
    sa.Column('opened_at', sqlmodel.sql.sqltypes.UTCDateTime(), nullable=False),
    sa.Column('opened_by', sqlmodel.sql.sqltypes.AutoString(), nullable=False),
    sa.Column('reason', sqlmodel.sql.sqltypes.AutoString(), nullable=False),
    sa.Column('published_at', sqlmodel.sql.sqltypes.UTCDateTime(), nullable=True),
    sa.Column('published_by', sqlmodel.sql.sqltypes.AutoString(), nullable=True),
    sa.Column('published_run_id', sa.Integer(), nullable=True),
    sa.Column('published_seq', sa.Integer(), nullable=True),
    sa.ForeignKeyConstraint(['cycle'], ['cycle.name'], ),
    sa.PrimaryKeyConstraint('cycle', 'revision')
    )
    op.create_table('decision',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('seq', sa.Integer(), nullable=True),
    sa.Column('cycle', sqlmodel.sql.sqltypes.AutoString(), nullable=False),
    sa.Column('revision', sa.Integer(), nullable=False),
    sa.Column('at', sqlmodel.sql.sqltypes.UTCDateTime(), nullable=False),
    sa.Column('author', sqlmodel.sql.sqltypes.AutoString(), nullable=False),
    sa.Column('item', sqlmodel.sql.sqltypes.AutoString(), nullable=True),
    sa.Column('family', sqlmodel.sql.sqltypes.AutoString(), nullable=True),
    sa.Column('location', sqlmodel.sql.sqltypes.AutoString(), nullable=True),
    sa.Column('region', sqlmodel.sql.sqltypes.AutoString(), nullable=True),
    sa.Column('period', sqlmodel.sql.sqltypes.AutoString(), nullable=False),
    sa.Column('kind', sqlmodel.sql.sqltypes.AutoString(), nullable=False),
    sa.Column('amount', sa.Float(), nullable=False),
    sa.Column('reason', sqlmodel.sql.sqltypes.AutoString(), nullable=False),
    sa.Column('withdrawn_at', sqlmodel.sql.sqltypes.UTCDateTime(), nullable=True),
    sa.Column('withdrawn_by', sqlmodel.sql.sqltypes.AutoString(), nullable=True),
    sa.Column('withdrawn_reason', sqlmodel.sql.sqltypes.AutoString(), nullable=True),
    sa.Column('withdrawn_seq', sa.Integer(), nullable=True),
    sa.ForeignKeyConstraint(['cycle'], ['cycle.name'], ),
    sa.PrimaryKeyConstraint('id')
    )
    with op.batch_alter_table('decision', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_decision_cycle'), ['cycle'], unique=False)

    op.create_table('submissioncycle',
    sa.Column('submission_id', sa.Integer(), nullable=False),
    sa.Column('cycle', sqlmodel.sql.sqltypes.AutoString(), nullable=False),
    sa.ForeignKeyConstraint(['submission_id'], ['submission.id'], ),
    sa.PrimaryKeyConstraint('submission_id', 'cycle')
    )
    with op.batch_alter_table('submissioncycle', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_submissioncycle_cycle'), ['cycle'], unique=False)




def downgrade() -> None:

    with op.batch_alter_table('submissioncycle', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_submissioncycle_cycle'))

    op.drop_table('submissioncycle')
    with op.batch_alter_table('decision', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_decision_cycle'))

    op.drop_table('decision')
    op.drop_table('cyclerevision')
    with op.batch_alter_table('consensusrun', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_consensusrun_cycle'))

    op.drop_table('consensusrun')
    with op.batch_alter_table('submission', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_submission_source'))
        batch_op.drop_index(batch_op.f('ix_submission_sha256'))
        batch_op.drop_index(batch_op.f('ix_submission_seq'))
        batch_op.drop_index(batch_op.f('ix_submission_cycle'))

    op.drop_table('submission')
    op.drop_table('setting')
    with op.batch_alter_table('journalentry', schema=None) as batch_op:
        batch_op.drop_index('ix_journal_cycle')

    op.drop_table('journalentry')
    op.drop_table('cycle')
    with op.batch_alter_table('cacheentry', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_cacheentry_kind'))

    op.drop_table('cacheentry')
    op.drop_table('blob')


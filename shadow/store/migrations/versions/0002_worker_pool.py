"""worker pool: workers, robot leases with fencing tokens, lease history

Revision ID: 0002
Revises: 0001
Create Date: 2026-12-02 08:20:00.000000

"""

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0002"
down_revision: str | Sequence[str] | None = "0001"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    """Upgrade schema."""
    op.create_table(
        "workers",
        sa.Column("worker_id", sa.String(length=100), nullable=False),
        sa.Column("incarnation", sa.String(length=32), nullable=False),
        sa.Column("host", sa.String(length=200), nullable=False),
        sa.Column("pid", sa.Integer(), nullable=False),
        sa.Column("started_at_s", sa.Float(), nullable=False),
        sa.Column("heartbeat_at_s", sa.Float(), nullable=False),
        sa.Column("expires_at_s", sa.Float(), nullable=False),
        sa.PrimaryKeyConstraint("worker_id", name=op.f("pk_workers")),
    )
    op.create_table(
        "robot_leases",
        sa.Column("robot_id", sa.String(length=200), nullable=False),
        sa.Column("owner", sa.String(length=100), nullable=True),
        sa.Column("fencing_token", sa.BigInteger(), nullable=False),
        sa.Column("acquired_at_s", sa.Float(), nullable=True),
        sa.Column("expires_at_s", sa.Float(), nullable=False),
        sa.ForeignKeyConstraint(["robot_id"], ["robots.robot_id"], name=op.f("fk_robot_leases_robot_id_robots")),
        sa.PrimaryKeyConstraint("robot_id", name=op.f("pk_robot_leases")),
    )
    op.create_table(
        "lease_history",
        sa.Column("robot_id", sa.String(length=200), nullable=False),
        sa.Column("fencing_token", sa.BigInteger(), nullable=False),
        sa.Column("owner", sa.String(length=100), nullable=False),
        sa.Column("acquired_at_s", sa.Float(), nullable=False),
        sa.Column("ended_at_s", sa.Float(), nullable=True),
        sa.Column("end_cause", sa.String(length=16), nullable=True),
        sa.ForeignKeyConstraint(["robot_id"], ["robots.robot_id"], name=op.f("fk_lease_history_robot_id_robots")),
        sa.PrimaryKeyConstraint("robot_id", "fencing_token", name=op.f("pk_lease_history")),
    )
    with op.batch_alter_table("checkpoints", schema=None) as batch_op:
        batch_op.add_column(sa.Column("fencing_token", sa.BigInteger(), nullable=True))


def downgrade() -> None:
    """Downgrade schema."""
    with op.batch_alter_table("checkpoints", schema=None) as batch_op:
        batch_op.drop_column("fencing_token")
    op.drop_table("lease_history")
    op.drop_table("robot_leases")
    op.drop_table("workers")

"""series indices: estimates by (robot, parameter, time), health snapshots by (robot, scope, time)

The API's downsampled estimate series seeks each parameter's last row of a step, and finds the robot's
parameter names and health scopes by a loose index scan; without these indices both read the robot's whole
history (benchmarks/api_load.py).

Revision ID: 0003
Revises: 0002
Create Date: 2026-12-02 18:30:00.000000

"""

from collections.abc import Sequence

from alembic import op

revision: str = "0003"
down_revision: str | Sequence[str] | None = "0002"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    """Upgrade schema."""
    op.create_index("ix_estimates_series", "estimates", ["robot_id", "parameter", "time_s"], unique=False)
    op.create_index("ix_health_snapshots_scope", "health_snapshots", ["robot_id", "scope", "time_s"], unique=False)


def downgrade() -> None:
    """Downgrade schema."""
    op.drop_index("ix_health_snapshots_scope", table_name="health_snapshots")
    op.drop_index("ix_estimates_series", table_name="estimates")

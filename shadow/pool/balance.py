"""How many robots a worker aims at, and what it gives up or asks for in one round (pure, no I/O).

Every live worker computes the same share, ``ceil(robots / live workers)``, from the same two numbers
(the configured robots and the live rows of the ``workers`` table), so no coordinator is needed: a
worker holding more than its share releases the excess, one holding less claims free robots up to its
share. The shares add up to at least the number of robots, so every robot finds a taker once the
number of live workers stops changing; the ceiling keeps a worker from giving up a robot that nobody
else would take.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

from shadow.errors import ConfigurationError


def target_share(n_robots: int, n_live_workers: int) -> int:
    """Robots each worker aims at: ``ceil(n_robots / n_live_workers)``.

    >>> target_share(12, 3), target_share(12, 4), target_share(12, 5), target_share(0, 2)
    (4, 3, 3, 0)
    """
    if n_robots < 0:
        raise ConfigurationError(f"n_robots: must be >= 0, got {n_robots}")
    if n_live_workers < 1:
        raise ConfigurationError(f"n_live_workers: must be >= 1 (this worker is live), got {n_live_workers}")
    return math.ceil(n_robots / n_live_workers)


@dataclass(frozen=True, slots=True)
class Plan:
    """One round of a worker: the robots to release (already followed) and how many to claim."""

    release: tuple[str, ...]
    claim: int


def plan_round(owned: Sequence[str], *, n_robots: int, n_live_workers: int) -> Plan:
    """Release the excess over the share (the last robots in sorted order), or claim up to it.

    >>> plan_round(["a", "b", "c", "d"], n_robots=12, n_live_workers=4)
    Plan(release=('d',), claim=0)
    >>> plan_round(["a"], n_robots=12, n_live_workers=4)
    Plan(release=(), claim=2)
    """
    share = target_share(n_robots, n_live_workers)
    held = sorted(owned)
    if len(held) > share:
        return Plan(tuple(held[share:]), 0)
    return Plan((), share - len(held))

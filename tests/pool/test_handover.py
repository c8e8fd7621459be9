"""Service.detach at a hand-over: the step under way finishes (and acknowledges) before the session stops.

Without that wait the step's acknowledgements went to a session already disconnected: one warning per
message, and the broker sent every one of those messages again to the robot's next owner. No servers:
the pipeline and the session are stand-ins that record the order of what happened.
"""

from __future__ import annotations

import threading
from typing import Any

from shadow.service import RobotStatus, Service

ROBOT = "kestrel/handover/r00"


class BlockedPipeline:
    """A pipeline whose step waits for the test, then acknowledges what it took."""

    def __init__(self, events: list[str]) -> None:
        self.robot_id = ROBOT
        self.status = RobotStatus(ROBOT)
        self.fence = None
        self.lease_lost = False
        self.detached = False
        self.events = events
        self.entered = threading.Event()
        self.go_on = threading.Event()
        self.steps = 0

    def step(self) -> int:
        self.steps += 1
        self.entered.set()
        self.go_on.wait(10)
        self.events.append("acknowledged")
        return 1


class RecordingSession:
    def __init__(self, events: list[str]) -> None:
        self.robot_id = ROBOT
        self.events = events

    def stop(self) -> None:
        self.events.append("session stopped")


def test_detach_waits_for_the_step_under_way_before_stopping_the_session() -> None:
    events: list[str] = []
    pipeline = BlockedPipeline(events)
    store: Any = object()  # never used: no pruning (raw_retention_s=0), the stand-in writes nothing
    service = Service(store, [pipeline], [RecordingSession(events)], raw_retention_s=0)  # type: ignore[list-item]
    stepping = threading.Thread(target=service.run_once)
    stepping.start()
    assert pipeline.entered.wait(10)
    detaching = threading.Thread(target=service.detach, args=(ROBOT,))
    detaching.start()
    detaching.join(0.3)
    assert detaching.is_alive() and events == []  # waiting for the step, the session still open
    pipeline.go_on.set()
    stepping.join(10)
    detaching.join(10)
    assert events == ["acknowledged", "session stopped"]
    assert service.pipelines == [] and service.subscriptions == []
    service.run_once()
    assert pipeline.steps == 1  # a detached pipeline is not stepped again


def test_detach_does_not_wait_for_another_robots_step() -> None:
    events: list[str] = []
    busy = BlockedPipeline(events)
    other: Any = BlockedPipeline([])
    other.robot_id = "kestrel/handover/r01"
    other.go_on.set()
    store: Any = object()
    service = Service(store, [busy], [], raw_retention_s=0)  # type: ignore[list-item]
    service.attach(other)
    stepping = threading.Thread(target=service.run_once)
    stepping.start()
    assert busy.entered.wait(10)
    service.detach(other.robot_id, timeout_s=10)  # returns while busy's step is still under way
    assert stepping.is_alive() and [p.robot_id for p in service.pipelines] == [ROBOT]
    busy.go_on.set()
    stepping.join(10)
    assert other.steps == 0

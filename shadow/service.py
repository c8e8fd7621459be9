"""The service: the one place where ingest, the numerical core and the store meet.

Per robot: a persistent MQTT session (:class:`shadow.ingest.mqtt.RobotSubscription`) fills a bounded
inbox; one pipeline thread drains every robot's inbox in turn, decodes and validates each message
(bad ones become dead letters), puts the batches in sequence order (:class:`SequenceTracker`: duplicates
dropped, small reorderings repaired, gaps recorded as unmonitored intervals), runs the robot's monitor
(model -> estimator -> detectors) and writes the step's rows with the new checkpoint in one transaction.
Only then are the step's messages acknowledged to the broker, in arrival order. So:

* a crash loses nothing accepted: unacknowledged messages come again and the checkpoint says where the
  results stopped, so they are neither lost nor doubled;
* a database outage stops acknowledgements; the pipeline holds at most ``max_held_messages`` of a
  robot's messages, then stops taking more, the full inbox holds the network thread back and the
  broker keeps the rest (its queue is the bound); the service writes the results it kept in memory
  once the database is back. The outage is counted in :class:`ServiceStatus`.

In a worker pool (several services on one PostgreSQL, :mod:`shadow.pool`) a pipeline carries the
:class:`~shadow.store.repository.Fence` of its robot's lease and every write checks it; a refused write
(:class:`~shadow.store.repository.LeaseLostError`) drops the step, acknowledges nothing and marks the
pipeline ``lease_lost``, so the service stops stepping it and the pool takes it away. Robots come and
go while the service runs (:meth:`Service.attach`, :meth:`Service.detach`).
"""

from __future__ import annotations

import io
import json
import logging
import queue
import threading
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Protocol

import numpy as np

from shadow.errors import RejectedMessageError, ShadowError
from shadow.ingest.mqtt import MqttSettings, ReceivedMessage, RobotSubscription
from shadow.ingest.topics import RobotAddress, TopicKind, TopicLayout, check_sender
from shadow.ingest.wire import (
    Dropped,
    Gap,
    PlausibilityLimits,
    Released,
    Restart,
    SampleBatch,
    SequenceTracker,
    TrackerState,
    decode_message,
    encode_binary,
)
from shadow.store.repository import Checkpoint, Fence, LeaseLostError, SqlStore, StepResults, StoreUnavailableError

log = logging.getLogger(__name__)

CHECKPOINT_FORMAT = 2
CHECKPOINT_MAGIC = b"shadow-checkpoint\n"  # format 2; format 1 was an npz file (a zip: starts with b"PK")
_CHECKPOINT_DTYPES = frozenset("biuf")  # bool, signed and unsigned integers, floats: no objects, no strings


class Monitor(Protocol):
    """What the service needs from a robot's monitor (model -> estimator -> detectors), see shadow.monitoring."""

    def process_many(self, batches: list[SampleBatch]) -> StepResults: ...

    def process(self, batch: SampleBatch) -> StepResults: ...

    def save_state(self) -> dict[str, np.ndarray]: ...

    def restore_state(self, state: dict[str, np.ndarray]) -> None: ...


def pack_checkpoint(monitor_state: dict[str, np.ndarray], sequence_state: TrackerState) -> bytes:
    """Serialise the monitor's arrays and the sequence tracker's state.

    Format 2: ``CHECKPOINT_MAGIC``, a 4-byte little-endian length, a JSON header (format, sequence state,
    and per array its name, dtype, shape and byte count), then the arrays' bytes one after the other in C
    order. A checkpoint is written with every step, so its cost is paid at every step: for the example
    delta's 96 small arrays this takes about a tenth of a millisecond, where format 1 (``np.savez``, one zip
    member per array) took about 5 ms and 28 kB for 1.5 kB of numbers.
    """
    names, chunks = [], []
    for name, value in monitor_state.items():
        a = np.asarray(value)  # 0-d stays 0-d; tobytes() below is C order whatever the layout
        if a.dtype.kind not in _CHECKPOINT_DTYPES:
            raise ShadowError(f"checkpoint: array {name!r} has dtype {a.dtype}, not a number or bool")
        names.append([name, a.dtype.str, list(a.shape), a.nbytes])
        chunks.append(a.tobytes())
    header = json.dumps({"format": CHECKPOINT_FORMAT, "sequence": sequence_state.to_dict(), "arrays": names})
    encoded = header.encode()
    return b"".join([CHECKPOINT_MAGIC, len(encoded).to_bytes(4, "little"), encoded, *chunks])


def unpack_checkpoint(data: bytes) -> tuple[dict[str, np.ndarray], TrackerState]:
    """Inverse of :func:`pack_checkpoint`, also for format 1 (npz); anything else is an error, never a reset."""
    if data.startswith(b"PK"):
        return _unpack_checkpoint_npz(data)
    if not data.startswith(CHECKPOINT_MAGIC):
        raise ShadowError("checkpoint: not a checkpoint of this service (unknown leading bytes)")
    at = len(CHECKPOINT_MAGIC)
    size = int.from_bytes(data[at : at + 4], "little")
    at += 4
    meta = json.loads(data[at : at + size].decode())
    at += size
    if meta.get("format") != CHECKPOINT_FORMAT:
        raise ShadowError(f"checkpoint format {meta.get('format')!r} is not supported (this service: 1, 2)")
    arrays = {}
    for name, dtype_str, shape, nbytes in meta["arrays"]:
        dtype = np.dtype(dtype_str)
        if dtype.kind not in _CHECKPOINT_DTYPES or at + nbytes > len(data):
            raise ShadowError(f"checkpoint: array {name!r} is damaged ({dtype_str}, {nbytes} bytes)")
        arrays[name] = np.frombuffer(data, dtype=dtype, count=nbytes // max(dtype.itemsize, 1), offset=at)
        arrays[name] = arrays[name].reshape(tuple(shape)).copy()  # writeable, not a view of the stored bytes
        at += nbytes
    if at != len(data):
        raise ShadowError(f"checkpoint: {len(data) - at} bytes after the last array")
    return arrays, TrackerState.from_dict(meta["sequence"])


def _unpack_checkpoint_npz(data: bytes) -> tuple[dict[str, np.ndarray], TrackerState]:
    """Format 1: an npz file with the JSON header in its ``__meta__`` entry (checkpoints of older versions)."""
    with np.load(io.BytesIO(data), allow_pickle=False) as npz:
        arrays = {k: npz[k] for k in npz.files}
    meta = json.loads(arrays.pop("__meta__").tobytes().decode())
    if meta.get("format") != 1:
        raise ShadowError(f"checkpoint format {meta.get('format')!r} is not supported (this service: 1, 2)")
    return arrays, TrackerState.from_dict(meta["sequence"])


@dataclass
class RobotStatus:
    """Counters of one robot, for the status endpoint and the metrics."""

    robot_id: str
    messages_processed: int = 0
    samples_processed: int = 0
    dead_letters: int = 0
    duplicates_dropped: int = 0
    gaps: int = 0
    store_failures: int = 0
    last_sample_time_s: float | None = None
    last_step_at_s: float | None = None
    unwritten_steps: int = 0
    fenced_steps: int = 0  # writes refused because the robot's lease had gone to another worker


@dataclass
class ServiceStatus:
    robots: dict[str, RobotStatus] = field(default_factory=dict)
    started_at_s: float = field(default_factory=time.time)
    fenced_writes_refused: int = 0  # all robots', also of robots handed over since (their RobotStatus is gone)


class RobotPipeline:
    """One robot: inbox -> decode -> sequence -> monitor -> store -> acknowledge.

    A step takes what the inbox holds, up to ``max_messages_per_step``: one message or two while the service
    keeps up, a long run after an outage or a restart, when one commit and one monitor block per 400 messages
    drain a backlog about 1.4 times faster than per 50 (``python -m benchmarks.service``; the monitor's and the
    commit's fixed costs are spread over more samples).
    """

    def __init__(
        self,
        address: RobotAddress,
        monitor: Monitor,
        store: SqlStore,
        *,
        inbox: queue.Queue[ReceivedMessage],
        acknowledge: Callable[[ReceivedMessage], None],
        layout: TopicLayout,
        n_actuators: int,
        limits: PlausibilityLimits | None = None,
        keep_raw: bool = True,
        max_messages_per_step: int = 400,
        max_held_messages: int = 1000,
        reorder_window: int = 4,
        fence: Fence | None = None,
    ) -> None:
        self.address = address
        self.fence = fence
        self.lease_lost = False  # a fenced write was refused: the robot belongs to another worker now
        self.detached = False  # taken out of the service (Service.detach)
        self.robot_id = str(address)
        self.monitor = monitor
        self.store = store
        self.inbox = inbox
        self.acknowledge = acknowledge
        self.layout = layout
        self.n_actuators = n_actuators
        self.limits = limits
        self.keep_raw = keep_raw
        self.max_messages_per_step = max_messages_per_step
        self.max_held_messages = max_held_messages
        self.status = RobotStatus(self.robot_id)
        self.sequence = SequenceTracker(reorder_window=reorder_window)
        self._unwritten: StepResults | None = None
        self._unacknowledged: list[ReceivedMessage] = []
        self._restore()

    def _restore(self) -> None:
        cp = self.store.checkpoint(self.robot_id)
        if cp is None:
            return
        monitor_state, sequence_state = unpack_checkpoint(cp.state)
        self.monitor.restore_state(monitor_state)
        self.sequence = SequenceTracker(reorder_window=self.sequence.reorder_window, state=sequence_state)
        self.status.last_sample_time_s = cp.last_time_s
        log.info("robot %s: resumed from checkpoint at seq %d", self.robot_id, cp.last_seq)

    def step(self) -> int:
        """Handle what is in the inbox (up to a cap); returns how many messages were taken."""
        taken: list[ReceivedMessage] = []
        room = self.max_messages_per_step
        if self._unwritten is not None:  # the store is down: hold no more than the bound in memory
            room = min(room, self.max_held_messages - len(self._unacknowledged))
        while len(taken) < room:
            try:
                taken.append(self.inbox.get_nowait())
            except queue.Empty:
                break
        if not taken and self._unwritten is None:
            return 0
        results = StepResults(self.robot_id)
        released: list[SampleBatch] = []
        for message in taken:
            results.extend(self._handle(message, released))
        if released:
            results.extend(self._process(released))
        if taken:
            results.checkpoint = Checkpoint(
                self.robot_id,
                int(self.sequence.state.next_seq or 1) - 1,
                float(self.sequence.state.last_t_s or 0.0),
                pack_checkpoint(self.monitor.save_state(), self.sequence.state),
            )
        if self._unwritten is not None:
            self._unwritten.extend(results)
            results = self._unwritten
        self._unacknowledged.extend(taken)
        try:
            if self.fence is None:
                self.store.write_step(results)
            else:
                self.store.write_step(results, fence=self.fence)
        except LeaseLostError as exc:
            # another worker owns the robot now: it resumes from the last checkpoint written under a valid
            # lease, and the broker gives it every message not acknowledged here
            log.warning("robot %s: %s; dropping this step and the robot", self.robot_id, exc)
            self.status.fenced_steps += 1
            self.lease_lost = True
            self._unwritten = None
            self._unacknowledged.clear()
            return len(taken)
        except StoreUnavailableError as exc:
            if self._unwritten is None:
                log.warning("robot %s: store unavailable, holding results and acknowledgements: %s", self.robot_id, exc)
            self.status.store_failures += 1
            self._unwritten = results
            self.status.unwritten_steps += 1
            return len(taken)
        self._unwritten = None
        self.status.unwritten_steps = 0
        for message in self._unacknowledged:  # arrival order
            self.acknowledge(message)
        self._unacknowledged.clear()
        self.status.last_step_at_s = time.time()
        return len(taken)

    def _handle(self, message: ReceivedMessage, released: list[SampleBatch]) -> StepResults:
        out = StepResults(self.robot_id)
        try:
            address, kind = self.layout.parse(message.topic)
            if address != self.address or kind is not TopicKind.SAMPLES:
                raise RejectedMessageError("bad_topic", f"topic {message.topic!r} is not the topic of {self.address}")
            batch = decode_message(message.payload, n_actuators=self.n_actuators, limits=self.limits)
            check_sender(self.address, batch.robot_id)
        except RejectedMessageError as exc:
            self.status.dead_letters += 1
            out.dead_letters.append(
                {
                    "received_at_s": message.received_at_s,
                    "topic": message.topic,
                    "robot_id": self.robot_id,
                    "reason_code": exc.reason_code,
                    "reason": exc.reason,
                    "payload": message.payload,
                }
            )
            return out
        self.status.messages_processed += 1
        for event in self.sequence.push(batch):
            if isinstance(event, Released):
                released.append(event.batch)
            elif isinstance(event, Dropped):
                self.status.duplicates_dropped += 1
            elif isinstance(event, Gap):
                self.status.gaps += 1
                out.unmonitored.append(
                    {
                        "start_s": event.after_t_s,
                        "end_s": event.before_t_s,
                        "cause": "sequence_gap",
                        "detail": f"messages {event.first_seq}..{event.last_seq} never arrived",
                    }
                )
            elif isinstance(event, Restart):
                out.unmonitored.append(
                    {
                        "start_s": event.after_t_s,
                        "end_s": event.before_t_s,
                        "cause": "sender_restart",
                        "detail": f"sequence restarted from {event.previous_seq} to {event.new_seq}",
                    }
                )
        return out

    def _process(self, batches: list[SampleBatch]) -> StepResults:
        """Run the monitor on the released batches, as one block when it can."""
        try:
            out = self.monitor.process_many(batches)
        except ShadowError:
            out = StepResults(self.robot_id)  # the monitor left its state as it was: retry one by one
            for batch in batches:
                out.extend(self._process_one(batch))
        else:
            for batch in batches:
                out.extend(self._kept(batch))
        return out

    def _process_one(self, batch: SampleBatch) -> StepResults:
        try:
            out = self.monitor.process(batch)
        except ShadowError as exc:
            # the model refused the batch (e.g. an unreachable pose): keep it as evidence, say why
            self.status.dead_letters += 1
            out = StepResults(self.robot_id)
            out.dead_letters.append(
                {
                    "received_at_s": time.time(),
                    "topic": self.layout.samples_topic(self.address),
                    "robot_id": self.robot_id,
                    "reason_code": "model_refused",
                    "reason": str(exc),
                    "payload": encode_binary(batch),
                }
            )
            return out
        out.extend(self._kept(batch))
        return out

    def _kept(self, batch: SampleBatch) -> StepResults:
        """Raw retention and counters of a batch the monitor took."""
        out = StepResults(self.robot_id)
        if self.keep_raw:
            out.raw_batches.append(
                {
                    "seq": batch.seq,
                    "first_time_s": float(batch.t[0]),
                    "last_time_s": float(batch.t[-1]),
                    "n_samples": batch.n_samples,
                    "payload": encode_binary(batch),
                }
            )
        self.status.samples_processed += batch.n_samples
        self.status.last_sample_time_s = float(batch.t[-1])
        return out


class Service:
    """All robots of one configuration, one pipeline thread, one store."""

    def __init__(
        self,
        store: SqlStore,
        pipelines: Sequence[RobotPipeline],
        subscriptions: Sequence[RobotSubscription] = (),
        *,
        raw_retention_s: float = 3600.0,
        idle_sleep_s: float = 0.005,
    ) -> None:
        self.store = store
        self.pipelines = list(pipelines)
        self.subscriptions = list(subscriptions)
        self.raw_retention_s = raw_retention_s
        self.idle_sleep_s = idle_sleep_s
        self.status = ServiceStatus({p.robot_id: p.status for p in self.pipelines})
        self._changes = threading.Lock()  # attach/detach; the lists are replaced, never changed in place
        self._stepping: RobotPipeline | None = None  # the pipeline of the step under way (see detach)
        self._started = False
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None
        self._last_prune_s = 0.0

    def start(self) -> None:
        with self._changes:
            self._started = True
            for sub in self.subscriptions:
                sub.start(wait_s=None)  # paho keeps trying with back-off; a down broker is not fatal
        self._thread = threading.Thread(target=self._run, name="shadow-pipeline", daemon=True)
        self._thread.start()

    def stop(self, *, timeout_s: float = 10.0) -> None:
        self._stop.set()
        if self._thread is not None:
            self._thread.join(timeout_s)
        for sub in self.subscriptions:
            sub.stop()

    def attach(self, pipeline: RobotPipeline, subscription: RobotSubscription | None = None) -> None:
        """Start following one more robot (its session connects at once when the service runs)."""
        with self._changes:
            if any(p.robot_id == pipeline.robot_id for p in self.pipelines):
                raise ShadowError(f"robot {pipeline.robot_id} is followed already")
            if subscription is not None:
                if self._started:
                    subscription.start(wait_s=None)
                self.subscriptions = [*self.subscriptions, subscription]
            self.status.robots = {**self.status.robots, pipeline.robot_id: pipeline.status}
            self.pipelines = [*self.pipelines, pipeline]

    def detach(self, *robot_ids: str, timeout_s: float = 10.0) -> list[RobotPipeline]:
        """Stop following robots: their sessions disconnect (the broker keeps them and their messages).

        The sessions are stopped in parallel (a session waiting to reconnect takes up to its back-off to
        stop) and waited for, up to ``timeout_s``. A step of a detached robot already under way is waited
        for first (within the same ``timeout_s``), so its acknowledgements go out on the open connection and
        the next owner is not sent those messages again; the pool releases the lease after this returns.
        """
        ids = set(robot_ids)
        with self._changes:
            gone = [p for p in self.pipelines if p.robot_id in ids]
            subs = [s for s in self.subscriptions if s.robot_id in ids]
            self.pipelines = [p for p in self.pipelines if p.robot_id not in ids]
            self.subscriptions = [s for s in self.subscriptions if s.robot_id not in ids]
            self.status.robots = {k: v for k, v in self.status.robots.items() if k not in ids}
        for pipeline in gone:
            pipeline.detached = True
        deadline = time.monotonic() + timeout_s
        # run_once names the pipeline before it reads ``detached``: once the name is not one of these, none of
        # them is stepped again (no lock, so a busy pipeline thread cannot starve this wait)
        while self._stepping is not None and self._stepping in gone and time.monotonic() < deadline:
            time.sleep(0.002)
        stopping = [threading.Thread(target=sub.stop, name=f"stop-{sub.robot_id}", daemon=True) for sub in subs]
        for thread in stopping:
            thread.start()
        for thread in stopping:
            thread.join(max(0.0, deadline - time.monotonic()))
        return gone

    def run_once(self) -> int:
        """One pass over every robot; returns the number of messages taken."""
        taken = 0
        pipelines = list(self.pipelines)  # a snapshot: attach/detach replace the list
        try:
            for pipeline in pipelines:
                self._stepping = pipeline  # before the check: see detach
                if pipeline.lease_lost or pipeline.detached:
                    continue
                refused = pipeline.status.fenced_steps
                try:
                    taken += pipeline.step()
                finally:
                    self.status.fenced_writes_refused += pipeline.status.fenced_steps - refused
        finally:
            self._stepping = None
        now = time.time()
        if self.raw_retention_s > 0 and now - self._last_prune_s > 60.0:
            self._last_prune_s = now
            for pipeline in pipelines:
                try:
                    older_than_s = now - self.raw_retention_s
                    if pipeline.fence is None:
                        self.store.prune_raw_batches(pipeline.robot_id, older_than_s=older_than_s)
                    else:
                        self.store.prune_raw_batches(pipeline.robot_id, older_than_s=older_than_s, fence=pipeline.fence)
                except LeaseLostError:
                    self.status.fenced_writes_refused += 1  # the robot's new owner prunes it
                except StoreUnavailableError:
                    pass  # retried at the next prune
        return taken

    def _run(self) -> None:
        while not self._stop.is_set():
            try:
                if self.run_once() == 0:
                    self._stop.wait(self.idle_sleep_s)
            except Exception:  # keep following the other robots; the error is in the log with its trace
                log.exception("pipeline pass failed")
                self._stop.wait(1.0)


def subscription_for(address: RobotAddress, layout: TopicLayout, settings: MqttSettings) -> RobotSubscription:
    """The persistent session of one robot on its samples topic."""
    return RobotSubscription(str(address), layout.samples_topic(address), settings)

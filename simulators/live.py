"""Continuous simulated streams: windows of closed-loop motion, played out as a controller would send them.

The plant is expensive per time step and cheap per extra system (it is vectorised over a batch axis), so a
feed simulates ``windows_per_run`` independent windows side by side and plays them one after the other.
Between two windows the stream pauses for ``gap_s`` (longer than the estimator's gap limit), the way a
controller's stream stops between production orders: the monitor restarts its conditioning there and
records the pause as an unmonitored interval. Impacts are half-sine force pulses on the platform at random
times in some windows; the ground truth says where.
"""

from __future__ import annotations

import queue
import threading
import time
from collections.abc import Iterator
from dataclasses import dataclass, field

import numpy as np
from numpy.typing import NDArray

from shadow.ingest.wire import PositionUnit, SampleBatch
from shadow.robots.description import RobotDescription
from shadow.robots.parameters import MeasuredQuantity
from simulators.plant import HalfSinePulse, MassUpdate
from simulators.run import DemoEffects, RunRecord, delta_reference, demo_loop, hexapod_reference, run_closed_loop
from simulators.trajectories import delta_pick_place, hexapod_positioning

Array = NDArray[np.float64]
KELVIN_OFFSET = 273.15


@dataclass(frozen=True, slots=True)
class FeedSettings:
    """What a feed simulates. Effect sizes are invented for the demo (no source)."""

    windows_per_run: int = 8
    window_s: float = 6.0
    sample_step_s: float = 1e-3  # output (and control) period; the plant steps at the same rate (RK4)
    gap_s: float = 0.2
    impact_probability: float = 0.3  # share of windows with one impact
    impact_peak_rated_fraction: float = 0.3  # platform force peak / (rated effort / lever): see _impact_peak
    impact_duration_s: float = 0.03
    missed_pick_probability: float = 0.03  # delta: the gripper closes on nothing
    double_pick_probability: float = 0.03  # delta: two work pieces lifted at once
    effects: DemoEffects = field(default_factory=lambda: DemoEffects(coupling_frequency_hz=None, jitter_std_s=2e-6))


@dataclass(frozen=True, slots=True)
class Window:
    """One simulated window, times relative to its start."""

    t_s: Array  # (T,) reported stamps (with jitter)
    q: Array  # (T, n)
    measured: Array  # (T, n) effort [N m | N] or current [A]
    is_current: bool
    tool: NDArray[np.bool_]  # (T,)
    temperature_k: Array  # (T, n)
    impact_start_s: float | None
    impact_peak_n: float
    payload: Array  # (T, p) true payload parameters
    work_piece_masses_kg: list[float]  # delta: mass lifted in each cycle of the path (0: missed pick)

    @classmethod
    def from_record(
        cls,
        rec: RunRecord,
        i: int,
        *,
        impact_start_s: float | None = None,
        impact_peak_n: float = 0.0,
        work_piece_masses_kg: list[float] | None = None,
    ) -> Window:
        """Window ``i`` of a batched closed-loop run (temperatures to kelvin)."""
        return cls(
            t_s=rec.stamp_s[i],
            q=rec.q[i],
            measured=rec.effort[i],
            is_current=rec.is_current,
            tool=rec.tool[i],
            temperature_k=rec.temperature_c[i] + KELVIN_OFFSET,
            impact_start_s=impact_start_s,
            impact_peak_n=impact_peak_n,
            payload=rec.reference.theta_p[i],
            work_piece_masses_kg=[] if work_piece_masses_kg is None else work_piece_masses_kg,
        )


def rated_platform_force_n(description: RobotDescription) -> float:
    """About what the drives can push at the platform [N]: the smallest rated effort, over the upper arm
    length for a delta (torque / lever), as it is for a hexapod's legs (invented scale, no source)."""
    rated = min(d.rated_effort for d in description.parameters.drives)
    if description.family == "delta":
        return rated / description.parameters.upper_arm_length_m  # type: ignore[union-attr]
    return rated


def _impact_peak(description: RobotDescription, fraction: float) -> float:
    """A platform force of about ``fraction`` of what the drives can push at the platform [N]."""
    return fraction * rated_platform_force_n(description)


def simulate_windows(description: RobotDescription, rng: np.random.Generator, settings: FeedSettings) -> list[Window]:
    """``settings.windows_per_run`` independent windows in one batched closed-loop run."""
    b = settings.windows_per_run
    step = settings.sample_step_s
    t = np.arange(round(settings.window_s / step)) * step
    plant, controller, sensors = demo_loop(
        description, effects=settings.effects, internal_step_s=step, mass_update=MassUpdate.EVERY_STEP
    )
    if description.family == "delta":
        home = np.asarray(description.home_position_m, dtype=float)
        tool = description.tool
        n_cycles = int(np.ceil(settings.window_s / 0.8)) + 1
        cycles = [
            delta_pick_place(
                rng,
                n_cycles,
                centre_m=home + np.array([-0.15, 0.0, 0.0]),
                tool_mass_kg=tool.tool_mass_kg,  # type: ignore[union-attr]
                workpiece_mass_mean_kg=tool.work_piece_mass_kg,  # type: ignore[union-attr]
                workpiece_mass_std_kg=tool.work_piece_tolerance_kg / 3.0,  # type: ignore[union-attr]
                missed_pick_probability=settings.missed_pick_probability,
                double_pick_probability=settings.double_pick_probability,
            )
            for _ in range(b)
        ]
        reference = delta_reference(plant.mechanism, [c.path for c in cycles], t)[0]
        picked = [c.workpiece_mass_kg.tolist() for c in cycles]
        direction = np.tile([1.0, 0.0, 0.0], (b, 1))
        n = 3
    else:
        home = np.asarray(description.parameters.home_position_m, dtype=float)  # type: ignore[union-attr]
        fixture = description.tool.payload_parameters()  # type: ignore[union-attr]
        has_part = description.tool.work_piece_mass_kg > 0.0  # type: ignore[union-attr]
        part = description.tool.part.standard_parameters() if has_part else None  # type: ignore[union-attr]
        n_moves = int(np.ceil(settings.window_s / 0.9)) + 1
        samples = [
            hexapod_positioning(
                rng,
                n_moves,
                home_m=home,
                move_time_s=0.6,
                dwell_s=0.3,
                fixture_parameters=fixture,
                part_parameters=part,
            ).sample(t)
            for _ in range(b)
        ]
        reference = hexapod_reference(plant.mechanism, samples)
        direction = np.tile([0.0, 1.0, 0.0, 0.0, 0.0, 0.0], (b, 1))
        n = 6
        picked = [[] for _ in range(b)]
    has_impact = rng.random(b) < settings.impact_probability
    start = rng.uniform(0.5, settings.window_s - 1.5, b)
    peak = np.where(has_impact, _impact_peak(description, settings.impact_peak_rated_fraction), 0.0)
    pulse = HalfSinePulse(start, np.full(b, settings.impact_duration_s), peak, direction)
    rec = run_closed_loop(
        plant,
        controller,
        sensors,
        reference,
        rng,
        sample_step_s=step,
        substeps=1,
        ambient_c=np.full(b, 24.0),
        initial_temperature_c=np.full(n, 35.0),
        pulses=[pulse],
    )
    return [
        Window.from_record(
            rec,
            i,
            impact_start_s=float(start[i]) if has_impact[i] else None,
            impact_peak_n=float(peak[i]),
            work_piece_masses_kg=picked[i],
        )
        for i in range(b)
    ]


def window_batches(
    window: Window, robot: str, *, start_s: float, first_seq: int, samples_per_batch: int, family: str
) -> list[SampleBatch]:
    """The wire batches of one window, stamped from ``start_s`` (Unix seconds)."""
    out = []
    unit = PositionUnit.RAD if family == "delta" else PositionUnit.M
    kind = MeasuredQuantity.MOTOR_CURRENT if window.is_current else MeasuredQuantity.EFFORT
    for k, s in enumerate(range(0, window.t_s.shape[0], samples_per_batch)):
        e = slice(s, s + samples_per_batch)
        out.append(
            SampleBatch(
                robot_id=robot,
                seq=first_seq + k,
                position_unit=unit,
                effort_kind=kind,
                t=start_s + window.t_s[e],
                q=window.q[e],
                effort=None if window.is_current else window.measured[e],
                current=window.measured[e] if window.is_current else None,
                temperature_k=window.temperature_k[e],
                gripping=window.tool[e],
            )
        )
    return out


@dataclass
class Feed:
    """One robot's stream: windows simulated ahead in a background thread, stamped and cut into batches.

    ``truth`` gets one record per window played (its times in Unix seconds, the impact if any, the mean
    true payload), the ground truth of the stream.
    """

    description: RobotDescription
    robot: str
    rng: np.random.Generator
    settings: FeedSettings = field(default_factory=FeedSettings)
    first_settings: FeedSettings | None = None  # a smaller first run, so the stream starts sooner
    samples_per_batch: int = 10
    truth: list[dict[str, object]] = field(default_factory=list)
    realtime_start: bool = False  # stamp a late run from the wall clock (live), not back to back (recording)

    def _produce(self, out: queue.Queue[list[Window] | None], stop: threading.Event) -> None:
        settings = self.first_settings or self.settings
        while not stop.is_set():
            windows = simulate_windows(self.description, self.rng, settings)
            while not stop.is_set():
                try:
                    out.put(windows, timeout=0.2)
                    break
                except queue.Full:
                    continue
            settings = self.settings

    def batches(self, start_s: float, stop: threading.Event | None = None) -> Iterator[SampleBatch]:
        """Batches from ``start_s`` on, window after window, until ``stop`` is set."""
        stop = stop or threading.Event()
        runs: queue.Queue[list[Window] | None] = queue.Queue(maxsize=2)
        producer = threading.Thread(target=self._produce, args=(runs, stop), name="shadow-sim", daemon=True)
        producer.start()
        seq = 0
        t = start_s
        try:
            while not stop.is_set():
                try:
                    windows = runs.get(timeout=0.5)
                except queue.Empty:
                    continue
                if windows is None:
                    return
                t = max(t, time.time()) if self.realtime_start else t
                for window in windows:
                    self.truth.append(
                        {
                            "window_start_s": t,
                            "window_end_s": t + float(window.t_s[-1]),
                            "impact_start_s": None if window.impact_start_s is None else t + window.impact_start_s,
                            "impact_peak_n": window.impact_peak_n,
                            "payload_mean": window.payload.mean(axis=0).tolist(),
                            "work_piece_masses_kg": window.work_piece_masses_kg,
                        }
                    )
                    batches = window_batches(
                        window,
                        self.robot,
                        start_s=t,
                        first_seq=seq,
                        samples_per_batch=self.samples_per_batch,
                        family=self.description.family,
                    )
                    yield from batches
                    seq += len(batches)
                    t += float(window.t_s[-1]) + self.settings.gap_s
        finally:
            stop.set()


def pace(batches: Iterator[SampleBatch], *, realtime: bool, until_s: float | None) -> Iterator[SampleBatch]:
    """Hold each batch back until the wall clock reaches its last sample (``realtime``), up to ``until_s``."""
    for batch in batches:
        last = float(batch.t[-1])
        if until_s is not None and last > until_s:
            return
        if realtime:
            delay = last - time.time()
            if delay > 0:
                time.sleep(delay)
        yield batch

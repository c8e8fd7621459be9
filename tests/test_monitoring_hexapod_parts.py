"""The hexapod's part, end to end: the closed-loop simulator clamps it into the fixture, the monitor weighs it.

Every stretch with the tool state on is one clamped part. The plant carries what the test puts there: the declared
part on most stretches, nothing on one (the clamp closed on an empty fixture), two parts' worth on another. The
monitor must raise exactly those two as payload faults, with the masses it weighed, and nothing else.

The monitor starts from the nominal baseline and the default (wide) payload prior: a stretch is judged once the
filter state it is weighed against pins the part's column, here from the second stretch on (2.7 s), though the
fixture's mass alone is still uncertain by tens of grams.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest

from shadow.ingest.wire import Released, SequenceTracker
from shadow.monitoring import RobotMonitor, default_settings, nominal_baseline
from shadow.robots.description import load_description
from shadow.store.repository import StepResults
from simulators.live import FeedSettings, Window, window_batches
from simulators.plant import MassUpdate
from simulators.run import demo_loop, hexapod_reference, run_closed_loop
from simulators.trajectories import hexapod_positioning

EXAMPLE_HEXAPOD = "shadow/examples/hexapod_inspection.toml"
WINDOWS, WINDOW_S = 4, 8.0
EMPTY_AT = (1, 2)  # (window, clamped stretch in it): the fixture clamps on nothing
DOUBLE_AT = (2, 1)  # two parts' worth of mass


def clamped_runs(tool: np.ndarray) -> list[tuple[int, int]]:
    """[start, end) sample ranges of every stretch with the tool state on."""
    edges = np.flatnonzero(np.diff(np.concatenate([[0], tool.astype(np.int8), [0]])))
    return list(zip(edges[::2].tolist(), edges[1::2].tolist(), strict=True))


@pytest.fixture(scope="module")
def followed() -> dict:
    desc = load_description(EXAMPLE_HEXAPOD)
    fixture, part = desc.tool.payload_parameters(), desc.tool.part.standard_parameters()
    feed = FeedSettings()
    step = feed.sample_step_s
    t = np.arange(round(WINDOW_S / step)) * step
    rng = np.random.default_rng(20261204)
    home = np.asarray(desc.parameters.home_position_m, dtype=float)
    samples = []
    for w in range(WINDOWS):
        smp = hexapod_positioning(
            rng, 10, home_m=home, move_time_s=0.6, dwell_s=0.3, fixture_parameters=fixture, part_parameters=part
        ).sample(t)
        theta = smp.theta_p.copy()
        for (fw, k), carried in ((EMPTY_AT, fixture), (DOUBLE_AT, fixture + 2.0 * part)):
            if fw == w:
                a, b = clamped_runs(smp.tool)[k]
                theta[a:b] = carried
        samples.append(dataclasses.replace(smp, theta_p=theta))
    plant, controller, sensors = demo_loop(
        desc, effects=feed.effects, internal_step_s=step, mass_update=MassUpdate.EVERY_STEP
    )
    rec = run_closed_loop(
        plant,
        controller,
        sensors,
        hexapod_reference(plant.mechanism, samples),
        rng,
        sample_step_s=step,
        substeps=1,
        ambient_c=np.full(WINDOWS, 24.0),
        initial_temperature_c=np.full(6, 35.0),
    )
    sequence = SequenceTracker(reorder_window=4)
    released = []
    starts, t0, seq = [], 1_800_000_000.0, 0
    for i in range(WINDOWS):
        window = Window.from_record(rec, i)
        batches = window_batches(window, "aligner-t", start_s=t0, first_seq=seq, samples_per_batch=20, family="hexapod")
        released += [e.batch for b in batches for e in sequence.push(b) if isinstance(e, Released)]
        starts.append(t0)
        seq += len(batches)
        t0 += float(window.t_s[-1]) + feed.gap_s
    results = follow(desc, released)
    truth = []  # (start, end, carried part mass) of every clamped stretch, Unix seconds
    for i in range(WINDOWS):
        for a, b in clamped_runs(rec.tool[i]):
            mass = float(rec.reference.theta_p[i][a, 0] - fixture[0])
            truth.append((starts[i] + float(rec.stamp_s[i][a]), starts[i] + float(rec.stamp_s[i][b - 1]), mass))
    return {"description": desc, "results": results, "truth": truth, "part_kg": float(part[0]), "batches": released}


def follow(desc, batches: list, *, restart_at: int | None = None) -> StepResults:
    """The monitor over the batches, 50 a call, as the service runs it; ``restart_at``: a checkpoint restored into
    a fresh monitor before that batch (a restart)."""
    monitor = RobotMonitor("aligner-t", desc, nominal_baseline(desc), default_settings(desc))
    results = StepResults("aligner-t")
    cuts = sorted({*range(0, len(batches), 50), *([restart_at] if restart_at is not None else []), len(batches)})
    for a, b in zip(cuts[:-1], cuts[1:], strict=True):
        if a == restart_at:
            fresh = RobotMonitor("aligner-t", desc, nominal_baseline(desc), default_settings(desc))
            fresh.restore_state(monitor.save_state())
            monitor = fresh
        results.extend(monitor.process_many(batches[a:b]))
    results.extend(monitor.flush_events())
    return results


def stretch_of(truth: list[tuple[float, float, float]], t_s: float) -> int:
    """Index of the clamped stretch that ends nearest to ``t_s``."""
    return int(np.argmin([abs(end - t_s) for _, end, _ in truth]))


@pytest.mark.slow
def test_the_empty_and_the_doubled_clamp_are_the_only_payload_faults(followed: dict) -> None:
    truth, part_kg = followed["truth"], followed["part_kg"]
    faults = [e for e in followed["results"].events if e["kind"] == "payload_fault"]
    by_stretch = {stretch_of(truth, e["end_s"]): e for e in faults}
    assert len(by_stretch) == len(faults) == 2, [e["summary"] for e in faults]
    empty = next(i for i, (_, _, m) in enumerate(truth) if m == 0.0)
    double = next(i for i, (_, _, m) in enumerate(truth) if m > 1.5 * part_kg)
    assert by_stretch[empty]["figures"]["fault"] == "missed_pick"
    assert "the fixture clamped but held no part" in by_stretch[empty]["summary"]
    assert by_stretch[double]["figures"]["fault"] == "double_pick"
    for i, mass in ((empty, 0.0), (double, 2.0 * part_kg)):
        fig = by_stretch[i]["figures"]
        assert fig["expected_mass_kg"] == pytest.approx(part_kg)
        # weighed within a tenth of the part's mass of what the plant carried (the single stretch is 0.9 s long)
        assert fig["carried_mass_kg"] == pytest.approx(mass, abs=0.1 * part_kg)


@pytest.mark.slow
def test_every_clamped_stretch_is_weighed_near_what_it_held(followed: dict) -> None:
    truth, part_kg = followed["truth"], followed["part_kg"]
    rows = [e for e in followed["results"].estimates if e["parameter"] == "transfer_mass"]
    assert len(rows) >= len(truth) - 2  # the first stretch comes before the filter pins the part's column
    errors = np.array([r["value"] - truth[stretch_of(truth, r["time_s"])][2] for r in rows])
    tolerance = followed["description"].tool.work_piece_tolerance_kg
    # measured: median -0.025 kg (the single stretches read the part about 3 % light on this short feed; -0.008 kg
    # after 400 s, README), largest 0.050 kg; the declared tolerance is 0.03 kg
    assert abs(np.median(errors)) < tolerance
    assert np.abs(errors).max() < 0.1 * part_kg


@pytest.mark.slow
def test_a_restart_inside_a_clamped_stretch_changes_no_judgement(followed: dict) -> None:
    truth, batches = followed["truth"], followed["batches"]
    # the restart falls inside a faulty stretch, after an output closed in it (outputs close on whole seconds):
    # its weighing and its undo need the filter state from before it, which only the checkpoint still has
    start, end = next((a, b) for a, b, m in truth if abs(m - followed["part_kg"]) > 0.1 and np.ceil(a) + 0.1 < b)
    inside = next(k for k, b in enumerate(batches) if b.t[0] > np.ceil(start) + 0.05)
    assert batches[inside].t[0] < end
    restarted = follow(followed["description"], batches, restart_at=inside)

    def judged(results: StepResults) -> list:
        rows = [(e["time_s"], e["value"]) for e in results.estimates if e["parameter"] == "transfer_mass"]
        faults = [(e["start_s"], e["figures"]["fault"]) for e in results.events if e["kind"] == "payload_fault"]
        return rows + faults

    assert judged(restarted) == judged(followed["results"])  # exactly: the checkpoint holds the whole state

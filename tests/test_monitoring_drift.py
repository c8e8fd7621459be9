"""Model drift found live: the structural mode's frequency and damping tracked from the innovation (a drop is one
``drift`` event), and each actuator's residual RMS against the baseline noise (one event per excursion).

Synthetic delta streams (tests/synthetic.py) carry a resonance or extra effort noise of known size; the simulated
hexapod with a compliant drive train, knocked on its platform, is checked against the modes of its linearised
closed loop.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
from scipy import signal
from scipy.linalg import expm

from shadow.errors import ConfigurationError
from shadow.ingest.wire import Released, SequenceTracker
from shadow.monitoring import MonitorSettings, RobotMonitor, default_settings
from shadow.robots.drives import reflected_inertias
from shadow.store.repository import StepResults
from simulators.run import DemoEffects, demo_loop
from simulators.scenario import Scenario, generate, parse_scenario
from tests.synthetic import SyntheticStream, delta_stream

ROBOT = "kestrel/line2/p4"
FS = 1000.0


def resonance(rng: np.random.Generator, f_n: float, zeta: float, n: int, rms: float) -> np.ndarray:
    """(n, 3) white noise through ``w^2 / (s^2 + 2 zeta w s + w^2)``, zero-order hold (scipy.signal), scaled to rms."""
    w = 2 * np.pi * f_n
    b, a, _ = signal.cont2discrete(([w**2], [1.0, 2 * zeta * w, w**2]), 1 / FS, method="zoh")
    x = signal.lfilter(b.ravel(), a, rng.normal(size=(n, 3)), axis=0)
    return rms * x / x.std(axis=0)


def discrete_pole(f_n: float, zeta: float) -> tuple[float, float]:
    """f_n [Hz] and zeta of that filter's pole, from np.roots of its denominator mapped back by s = ln(z) / T."""
    w = 2 * np.pi * f_n
    _, a, _ = signal.cont2discrete(([w**2], [1.0, 2 * zeta * w, w**2]), 1 / FS, method="zoh")
    s = np.log(np.roots(a)[0]) * FS
    return abs(s) / (2 * np.pi), -s.real / abs(s)


def with_effort(stream: SyntheticStream, extra: np.ndarray) -> SyntheticStream:
    return dataclasses.replace(stream, effort=stream.effort + extra)


def run(monitor: RobotMonitor, batches: list, block: int = 10) -> StepResults:
    out = StepResults(monitor.robot_id)
    for k in range(0, len(batches), block):
        out.extend(monitor.process_many(batches[k : k + block]))
    return out


def mode_rows(res: StepResults, name: str) -> list[dict]:
    return [e for e in res.estimates if e["parameter"] == name]


def drift_events(res: StepResults, cause: str) -> list[dict]:
    return [e for e in res.events if e["kind"] == "drift" and e["figures"]["drift"] == cause]


def quick_mode_settings(stream: SyntheticStream, **changes: object) -> MonitorSettings:
    # 2 s segments (0.5 Hz bins), an estimate every 9 s of stream: short tests, same code as the 4 s / 60 s defaults
    return dataclasses.replace(default_settings(stream.description), mode_segment_s=2.0, mode_window_s=10.0, **changes)


@pytest.fixture(scope="module")
def falling_mode() -> tuple[SyntheticStream, StepResults]:
    # a 30 Hz mode (zeta 0.03) for 30 s, then 26 Hz: a stiffness lost by a quarter, (26 / 30)^2
    rng = np.random.default_rng(11)
    stream = delta_stream(rng, duration_s=60.0)
    n = stream.t.shape[0]
    extra = np.concatenate([resonance(rng, 30.0, 0.03, n // 2, 0.5), resonance(rng, 26.0, 0.03, n - n // 2, 0.5)])
    stream = with_effort(stream, extra)
    monitor = RobotMonitor(ROBOT, stream.description, None, quick_mode_settings(stream))
    return stream, run(monitor, stream.batches("p4", 100))


def test_a_resonance_in_the_effort_is_tracked_live(falling_mode) -> None:
    # Against scipy.signal: the zero-order-hold pole of the filter that shaped the added effort
    stream, res = falling_mode
    freq, damp = mode_rows(res, "mode_frequency_hz"), mode_rows(res, "mode_damping_ratio")
    assert [e["time_s"] for e in freq] == [e["time_s"] for e in damp] and len(freq) == 6  # one per 9 s
    f_ref, zeta_ref = discrete_pole(30.0, 0.03)
    before = [(f, z) for f, z in zip(freq, damp, strict=True) if f["time_s"] < stream.t[0] + 30.0]
    assert len(before) == 3
    for f, z in before:
        assert f["identifiable"] and z["identifiable"]  # GOOD fits
        assert f["value"] == pytest.approx(f_ref, rel=0.01)
        assert z["value"] == pytest.approx(zeta_ref, rel=0.25)  # damping spans few bins (shadow.detection.modes)
        assert 0 < f["std"] < 0.5 and 0 < z["std"] < 0.01


def test_a_falling_mode_frequency_is_one_drift_event_with_both_frequencies(falling_mode) -> None:
    stream, res = falling_mode
    (event,) = drift_events(res, "structural_mode")  # once, not at every later estimate
    fig = event["figures"]
    f_before, zeta_before = discrete_pole(30.0, 0.03)
    f_after, zeta_after = discrete_pole(26.0, 0.03)
    assert fig["frequency_before_hz"] == pytest.approx(f_before, rel=0.01)
    assert fig["frequency_after_hz"] == pytest.approx(f_after, rel=0.01)
    assert fig["frequency_drop_fraction"] == pytest.approx(1 - f_after / f_before, abs=0.015)
    assert fig["damping_ratio_before"] == pytest.approx(zeta_before, rel=0.25)
    assert fig["damping_ratio_after"] == pytest.approx(zeta_after, rel=0.25)
    assert fig["reference_estimates_count"] == 3 and fig["segments_count"] == 9
    assert event["start_s"] > stream.t[0] + 30.0 and event["end_s"] - event["start_s"] == pytest.approx(10.0, abs=0.01)
    assert "fell from" in event["summary"] and "loosening joint" in event["summary"]
    assert event["severity"] == "medium" and event["evidence"] is None


def test_smooth_motion_alone_gives_no_mode_and_no_drift(rng: np.random.Generator) -> None:
    # the synthetic stream's residual is white sensor noise: no peak, so no rows (and nothing to compare)
    stream = delta_stream(rng, duration_s=25.0)
    res = run(RobotMonitor(ROBOT, stream.description, None, quick_mode_settings(stream)), stream.batches("p4", 100))
    assert mode_rows(res, "mode_frequency_hz") == [] and res.events == []


def test_extra_effort_noise_is_one_drift_event_per_excursion() -> None:
    # gear chatter on actuator 2 (white effort noise of 0.8 N m, independent of the sensor's 0.36 N m) in
    # [11, 19) s and [27, 35) s; RMS windows of 4 s. Variances of independent noises add (a law of
    # probability): RMS sqrt(0.36^2 + 0.8^2) = 0.877 N m, 2.44 times the baseline noise.
    rng = np.random.default_rng(12)
    stream = delta_stream(rng, duration_s=40.0)
    t = stream.t - stream.t[0]
    chatter = np.zeros_like(stream.effort)
    on = ((t >= 11.0) & (t < 19.0)) | ((t >= 27.0) & (t < 35.0))
    chatter[on, 1] = rng.normal(0.0, 0.8, on.sum())
    stream = with_effort(stream, chatter)
    settings = dataclasses.replace(default_settings(stream.description), wear_window_s=4.0)
    res = run(RobotMonitor(ROBOT, stream.description, None, settings), stream.batches("p4", 100))
    events = drift_events(res, "residual_rms")
    assert [e["figures"]["actuator"] for e in events] == [2, 2]  # [16, 20) s stays alarmed; [20, 24) s re-arms
    assert [round(e["start_s"] - stream.t[0]) for e in events] == [12, 28]  # the windows [12, 16) and [28, 32) s
    for e in events:
        fig = e["figures"]
        expected = np.sqrt(0.36**2 + 0.8**2) / 0.36
        assert fig["rms_to_noise_ratio"] == pytest.approx(expected, rel=0.05)
        assert fig["baseline_noise_std"] == pytest.approx(0.36) and fig["limit_ratio"] == 2.0
        assert fig["window_s"] == pytest.approx(4.0, abs=0.01) and fig["samples_count"] == 4000
        assert "actuator 2" in e["summary"] and "backlash" in e["summary"]


def chattering(rng: np.random.Generator, spans: list[tuple[float, float]], **stream_options: object) -> SyntheticStream:
    """A 40 s synthetic delta with white effort noise of 0.8 N m on actuator 2 inside ``spans`` [s]."""
    stream = delta_stream(rng, duration_s=40.0, **stream_options)  # type: ignore[arg-type]
    t = stream.t - stream.t[0]
    chatter = np.zeros_like(stream.effort)
    on = np.zeros(t.shape, dtype=bool)
    for a, b in spans:
        on |= (t >= a) & (t < b)
    chatter[on, 1] = rng.normal(0.0, 0.8, on.sum())
    return with_effort(stream, chatter)


def test_a_window_holding_a_contact_is_not_judged_for_drift() -> None:
    # the same chatter in [11, 19) s and [28, 32) s, and an impact at 29.5 s inside the second excursion: the
    # window [28, 32) s holds a collision, whose residual is the impact's, so only [12, 16) s is a drift event
    stream = chattering(np.random.default_rng(12), [(11.0, 19.0), (28.0, 32.0)], impact_at_s=29.5)
    settings = dataclasses.replace(default_settings(stream.description), wear_window_s=4.0)
    res = run(RobotMonitor(ROBOT, stream.description, None, settings), stream.batches("p4", 100))
    collisions = [e for e in res.events if e["kind"] == "collision"]
    assert [round(e["start_s"] - stream.t[0], 1) for e in collisions] == [29.5]
    assert [round(e["start_s"] - stream.t[0]) for e in drift_events(res, "residual_rms")] == [12]
    # the same stream without the impact: both excursions are events
    calm = chattering(np.random.default_rng(12), [(11.0, 19.0), (28.0, 32.0)])
    res = run(RobotMonitor(ROBOT, calm.description, None, settings), calm.batches("p4", 100))
    assert [round(e["start_s"] - calm.t[0]) for e in drift_events(res, "residual_rms")] == [12, 28]


def test_a_window_shorter_than_the_minimum_is_not_judged() -> None:
    stream = chattering(np.random.default_rng(12), [(11.0, 19.0)])
    # a window's stream spans 3.999 s (first to last sample of 4 s at 1 kHz)
    for min_s, expected in [(3.5, [12]), (4.0, [])]:
        settings = dataclasses.replace(
            default_settings(stream.description), wear_window_s=4.0, residual_drift_min_s=min_s
        )
        res = run(RobotMonitor(ROBOT, stream.description, None, settings), stream.batches("p4", 100))
        assert [round(e["start_s"] - stream.t[0]) for e in drift_events(res, "residual_rms")] == expected


def test_restored_monitor_continues_the_drift_watches_exactly(falling_mode) -> None:
    stream, whole = falling_mode
    settings = quick_mode_settings(stream, wear_window_s=10.0)
    batches = stream.batches("p4", 100)
    every = run(RobotMonitor(ROBOT, stream.description, None, settings), batches)
    first = RobotMonitor(ROBOT, stream.description, None, settings)
    head = run(first, batches[:335])  # 33.5 s: an open Welch segment, a partial sum, a reference, an RMS window
    state = first.save_state()
    assert 0 < state["modes/part_t"].shape[0] < 2000 and state["modes/reference"].shape == (3, 2)
    second = RobotMonitor(ROBOT, stream.description, None, settings)
    second.restore_state({k: np.array(v, copy=True) for k, v in state.items()})
    head.extend(run(second, batches[335:]))
    rows = [(e["time_s"], e["parameter"], e["value"]) for e in head.estimates if e["parameter"].startswith("mode_")]
    assert rows == [(e["time_s"], e["parameter"], e["value"]) for e in every.estimates if "mode_" in e["parameter"]]
    assert [(e["start_s"], e["figures"]) for e in head.events if e["kind"] == "drift"] == [
        (e["start_s"], e["figures"]) for e in every.events if e["kind"] == "drift"
    ]
    assert drift_events(every, "structural_mode")


def test_a_checkpoint_from_before_the_drift_watches_still_resumes(falling_mode) -> None:
    stream, _ = falling_mode
    settings = quick_mode_settings(stream)
    batches = stream.batches("p4", 100)
    first = RobotMonitor(ROBOT, stream.description, None, settings)
    run(first, batches[:150])
    old = {k: v for k, v in first.save_state().items() if not k.startswith(("modes/", "residual_drift/"))}
    second = RobotMonitor(ROBOT, stream.description, None, settings)
    second.restore_state(old)
    res = run(second, batches[150:300])
    # the Welch sum starts afresh with the first output after the restart, which holds the second before it (the
    # tracker's open output period, in the old checkpoint): an estimate 10 s later, 9 s after the restart
    (freq,) = mode_rows(res, "mode_frequency_hz")
    assert freq["value"] == pytest.approx(discrete_pole(30.0, 0.03)[0], rel=0.01)
    assert freq["time_s"] - stream.t[15_000] == pytest.approx(9.0, abs=0.05)


def test_bad_drift_settings_are_refused() -> None:
    tracker = default_settings(delta_stream(np.random.default_rng(1), duration_s=0.1).description).tracker
    for bad, match in [
        ({"mode_segment_s": 0.0}, "mode_segment_s"),
        ({"mode_segment_s": 90.0}, "segment <= window"),
        ({"mode_drift_fraction": 1.5}, "mode_drift_fraction"),
        ({"mode_reference_estimates": 0}, "mode_reference_estimates"),
        ({"residual_drift_clear_ratio": 3.0}, "clear <= ratio"),
        ({"residual_drift_settle_s": -1.0}, "residual_drift_settle_s"),
        ({"residual_drift_min_s": -1.0}, "residual_drift_min_s"),
        ({"residual_drift_min_s": 700.0}, "residual_drift_min_s"),
    ]:
        with pytest.raises(ConfigurationError, match=match):
            MonitorSettings(tracker=tracker, **bad)  # type: ignore[arg-type]


# ------------------------------------------------------------------------------------- the simulated hexapod
def knocked_hexapod(mode_hz: float, start: str, window_s: float) -> Scenario:
    """The example hexapod, its drive train compliant, tapped sideways on the platform once a second (10 ms)."""
    knocks = "".join(
        f"[[faults.impacts.listed]]\nwindow = 0\noffset_s = {s:.1f}\n" for s in np.arange(1.0, window_s - 0.5, 1.0)
    )
    return parse_scenario(
        f"""
format = "shadow-scenario/1"
name = "knocked-hexapod"
robot = "hexapod_inspection"
robot_id = "h1"
seed = 3
start = {start}
horizon_days = 1.0

[sampling]
windows = 1
window_s = {window_s}
spacing = "listed"
days = [0.0]
sample_step_s = 0.002
samples_per_message = 10

[plant]
structural_mode_hz = {mode_hz}

[faults.impacts]
peak_rated_fraction = 0.3
duration_s = 0.01
direction = "horizontal"
{knocks}"""
    )


def closed_loop_modes(scenario: Scenario) -> list[tuple[float, float]]:
    """(f_n [Hz], zeta) of the lightly damped modes of the simulated loop, linearised at the home pose.

    Plant (simulators/plant.py): ``J_r qdd_m = tau_a - b qd_m - tau_c``, ``M_L qdd_L = tau_c``,
    ``tau_c = K (q_m - q_L) + C (qd_m - qd_L)``, ``T_c tau_a' = u - tau_a``; its exact zero-order-hold
    equivalent over one sample h (matrix exponential of the augmented system); the controller
    (simulators/controller.py) ``u_k = -K_p q_k - K_d (q_k - q_(k-1)) / h + K_i z_k``, ``z_(k+1) = z_k - h q_k``
    on the motor-side reading. Modes from the eigenvalues lambda of the closed loop, ``s = ln(lambda) / h``
    (sampled-data state space: Franklin, Powell and Workman, "Digital Control of Dynamic Systems", 3rd ed.,
    1998, ch. 4 and 8; from memory). Gravity's stiffness, friction's Coulomb part and the pose's change
    along the motion are left out.
    """
    d = scenario.description
    h = scenario.sampling.sample_step_s
    plant, pid, _ = demo_loop(
        d, effects=DemoEffects(coupling_frequency_hz=scenario.plant.structural_mode_hz), internal_step_s=h
    )
    n = d.n_actuators
    j_r = reflected_inertias(d.parameters.drives)
    model = plant.mechanism
    q_home = model.inverse_kinematics(np.asarray(d.parameters.home_position_m, dtype=float)[None], np.eye(3)[None])
    M_L = model.mass_matrix(q_home, d.tool.payload_parameters(gripping=False))[0] - np.diag(j_r)  # load side
    coupling, friction = plant.config.coupling, plant.config.friction
    assert coupling is not None and friction is not None
    K, C = np.diag(coupling.stiffness), np.diag(coupling.damping)
    b = np.diag(np.asarray(friction.viscous_ref, dtype=float))
    T_c = np.asarray(plant.config.current_time_constant_s, dtype=float)
    Id, Z = np.eye(n), np.zeros((n, n))
    Jr_inv, ML_inv = np.diag(1 / j_r), np.linalg.inv(M_L)
    A = np.block([  # x = [q_m, q_L, qd_m, qd_L, tau_a]
        [Z, Z, Id, Z, Z],
        [Z, Z, Z, Id, Z],
        [-Jr_inv @ K, Jr_inv @ K, -Jr_inv @ (C + b), Jr_inv @ C, Jr_inv],
        [ML_inv @ K, -ML_inv @ K, ML_inv @ C, -ML_inv @ C, Z],
        [Z, Z, Z, Z, -np.diag(1 / T_c)],
    ])  # fmt: skip
    B = np.vstack([Z, Z, Z, Z, np.diag(1 / T_c)])
    m = A.shape[0]
    E = expm(np.block([[A, B], [np.zeros((n, m + n))]]) * h)  # [[Phi, Gamma], [0, I]]: zero-order hold
    Phi, Gamma = E[:m, :m], E[:m, m:]
    Cq = np.hstack([Id, Z, Z, Z, Z])
    Kp, Kd, Ki = np.diag(pid.kp), np.diag(pid.kd), np.diag(pid.ki)
    loop = np.block([  # X = [x, q_(k-1), z]
        [Phi - Gamma @ (Kp + Kd / h) @ Cq, Gamma @ Kd / h, Gamma @ Ki],
        [Cq, Z, Z],
        [-h * Cq, Z, Id],
    ])  # fmt: skip
    s = np.log(np.linalg.eigvals(loop).astype(complex)) / h
    s = s[s.imag > 0]
    modes = sorted((float(abs(v) / (2 * np.pi)), float(-v.real / abs(v))) for v in s)
    return [(f, z) for f, z in modes if z < 0.3]


def play(monitor: RobotMonitor, scenario: Scenario) -> StepResults:
    tracker = SequenceTracker(reorder_window=4)
    results = StepResults(monitor.robot_id)
    for window in generate(scenario):
        released = [e.batch for b in window.batches for e in tracker.push(b) if isinstance(e, Released)]
        results.extend(run(monitor, released, block=50))
    return results


@pytest.fixture(scope="module")
def knocked() -> dict:
    stiff = knocked_hexapod(40.0, "2027-03-01T06:00:00Z", 22.0)
    soft = knocked_hexapod(36.0, "2027-03-08T06:00:00Z", 21.0)  # a week later, the drive train 19 % softer
    settings = dataclasses.replace(
        default_settings(stiff.description), mode_segment_s=2.0, mode_window_s=10.0, mode_reference_estimates=2
    )
    monitor = RobotMonitor(stiff.robot_id, stiff.description, None, settings)
    before = play(monitor, stiff)
    restarted = RobotMonitor(stiff.robot_id, stiff.description, None, settings)  # the service restarts between
    restarted.restore_state(monitor.save_state())
    after = play(restarted, soft)
    return {"stiff": stiff, "soft": soft, "before": before, "after": after}


@pytest.mark.slow
def test_the_compliant_hexapods_mode_is_tracked_at_its_closed_loop_frequency(knocked) -> None:
    # The residual rings at the platform's lowest mode on its six springs as the position loop holds it, not at
    # structural_mode_hz (each leg's two-mass mode on the diagonal of M at home): 40 Hz there is ~25.5 Hz here.
    (f_ref, zeta_ref), (f_twin, _), *_ = closed_loop_modes(knocked["stiff"])
    assert f_ref < f_twin < 1.01 * f_ref < 0.7 * 40.0  # two sideways modes 0.7 % apart; they merge into one peak
    freq = mode_rows(knocked["before"], "mode_frequency_hz")
    damp = mode_rows(knocked["before"], "mode_damping_ratio")
    assert len(freq) == 2 and all(e["identifiable"] for e in freq + damp)
    for f, z in zip(freq, damp, strict=True):
        # the pose moves along the motion and the reference is the home pose's (and the fixture's alone, while the
        # part is clamped half of the time): the two windows measured -2.9 % and -1.3 % (+2.3 %, +5.4 % before
        # the part model; the cubic conditioner without the efforts' timing gave +1.0 %, +3.9 %)
        assert f["value"] == pytest.approx(f_ref, rel=0.07)
        assert z["value"] == pytest.approx(zeta_ref, rel=0.35)  # measured -4 %, -2 % (two modes merge into one peak)
    assert drift_events(knocked["before"], "structural_mode") == []


@pytest.mark.slow
def test_a_softer_drive_train_after_a_restart_is_one_drift_event(knocked) -> None:
    (f_stiff, _), *_ = closed_loop_modes(knocked["stiff"])
    (f_soft, zeta_soft), *_ = closed_loop_modes(knocked["soft"])
    (event,) = drift_events(knocked["after"], "structural_mode")
    fig = event["figures"]
    # the part is clamped and taken out in the dwells (the reference is the fixture alone: 0.3 % higher than with
    # the part), and the event carries the first estimate past the limit: measured -2.1 % (median of two), +2.4 %
    assert fig["frequency_before_hz"] == pytest.approx(f_stiff, rel=0.05)
    assert fig["frequency_after_hz"] == pytest.approx(f_soft, rel=0.05)
    # the two errors add: measured 6.2 % for the reference's 10.3 % (before the part model: 1 point apart)
    assert fig["frequency_drop_fraction"] == pytest.approx(1 - f_soft / f_stiff, abs=0.05)
    # measured +16 % (+46 % while the feed loaded and unloaded the whole fixture; within 35 % before the Stribeck
    # term): in the dwells the platform rings about zero speed, where the Coulomb and Stribeck columns follow the
    # sign of the ringing velocity; the linearised reference leaves friction's Coulomb part out
    assert fig["damping_ratio_after"] == pytest.approx(zeta_soft, rel=0.5)
    # the Welch sum carries across the restart (segments either side of a gap average as any two: WelchAccumulator),
    # so the first estimate after it may begin in the week-old run; it ends in the softer one
    assert knocked["stiff"].window_start_s(0) <= event["start_s"] < event["end_s"]
    assert knocked["soft"].window_start_s(0) < event["end_s"]
    last = mode_rows(knocked["after"], "mode_frequency_hz")[-1]
    assert last["identifiable"] and last["value"] == pytest.approx(f_soft, rel=0.05)

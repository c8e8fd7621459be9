"""Live payload and friction tracker on the real delta and hexapod models, and the baseline record."""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
from numpy.testing import assert_allclose, assert_array_equal

from shadow.errors import ConfigurationError, ShapeError
from shadow.estimation.baseline import Baseline
from shadow.estimation.conditioning import REASON_GAP
from shadow.estimation.state import pack_state, unpack_state
from shadow.estimation.tracker import PayloadFrictionTracker, TrackerOutput, TrackerSettings
from shadow.robots.delta import DeltaModel
from shadow.robots.description import build_model, example_paths, load_description
from shadow.robots.friction import friction_effort
from shadow.robots.hexapod import HexapodModel
from shadow.robots.parameters import ReportedEffort

DT_S = 1.0e-3
SMOOTH_VELOCITY = 0.01  # rad/s
TOOL_KG, WORK_KG = 0.35, 0.25  # demo values of the example delta
THETA_F = np.tile([0.8, 0.15, 0.05], 3)  # demo friction: Coulomb [N m], viscous [N m s/rad], offset [N m]
SIGMA_NM = 0.05  # demo measurement noise
# a slowish current loop (T = 0.8 ms), so that the timing matters; much slower, and the pure delay the tracker
# models stops matching the command u = tau + T dtau/dt at the Coulomb friction's sign change (a spike of width v_s/qdd)
BANDWIDTH_HZ = np.full(3, 200.0)
COMMAND = (ReportedEffort.COMMAND,) * 3  # the demo stream carries the drives' effort commands


@pytest.fixture(scope="module")
def delta() -> DeltaModel:
    path = next(p for p in example_paths() if "delta" in p.name)
    model = build_model(load_description(path))
    assert isinstance(model, DeltaModel)
    return model


def motion_at(model: DeltaModel, t: np.ndarray) -> tuple[np.ndarray, ...]:
    """(q, qd, qdd) of the demo motion, sinusoids about the home pose, at times t (N,)."""
    q0 = model.inverse_kinematics(np.array([[0.0, 0.0, -0.8]]))[0]
    w = 2 * np.pi * np.array([0.7, 1.1, 1.3])
    a = np.array([0.3, 0.25, 0.35])
    phase = np.outer(t, w) + np.array([0.0, 1.0, 2.0])
    return q0 + a * np.sin(phase), a * w * np.cos(phase), -a * w**2 * np.sin(phase)


def delta_motion(model: DeltaModel, duration_s: float, t0_s: float = 0.0) -> tuple[np.ndarray, ...]:
    t = t0_s + np.arange(int(round(duration_s / DT_S))) * DT_S
    return (t, *motion_at(model, t))


def actual_effort(model: DeltaModel, t: np.ndarray, grip: np.ndarray, theta_f: np.ndarray = THETA_F) -> np.ndarray:
    """tau = tau_known + Y_p theta_p + tau_f of the demo motion at times t: the effort that moves the arm."""
    q, qd, qdd = motion_at(model, t)
    tau_known, y_p = model.rigid_regressor(q, qd, qdd)
    tau = tau_known + y_p[:, :, 0] * (TOOL_KG + WORK_KG * grip)[:, None]  # tau = tau_known + Y_p theta_p
    return tau + friction_effort(qd, theta_f, smooth_velocity=SMOOTH_VELOCITY)


def delta_stream(
    model: DeltaModel,
    rng: np.random.Generator,
    duration_s: float,
    *,
    command: bool = True,
    bandwidth_hz: np.ndarray = BANDWIDTH_HZ,
    theta_f: np.ndarray = THETA_F,
    sigma: float = SIGMA_NM,
):
    """The demo stream: actual efforts, or (``command``) the commands of a slow current loop that produce them.

    The arm moves under the actual effort tau; a first-order loop T u' + ... gives tau = u - T tau' exactly
    backwards, so the command is u = tau + T dtau/dt (the inverse of the lag 1 / (T s + 1)); dtau/dt by a
    central difference of the closed-form motion (step 1e-6 s, error ~1e-9 N m).
    """
    t, q, _, _ = delta_motion(model, duration_s)
    grip = np.floor(t / 0.7) % 2 == 1  # picks every 1.4 s
    tau = actual_effort(model, t, grip, theta_f)
    if command:
        eps = 1e-6
        rate = (actual_effort(model, t + eps, grip, theta_f) - actual_effort(model, t - eps, grip, theta_f)) / (2 * eps)
        tau = tau + rate / (2.0 * np.pi * bandwidth_hz)  # u = tau + T dtau/dt, T = 1 / (2 pi f)
    return t, q, tau + sigma * rng.normal(size=tau.shape), grip


def delta_baseline() -> Baseline:
    return Baseline(
        friction_parameters=THETA_F * 1.3,
        friction_covariance=np.diag((0.3 * THETA_F + 0.01) ** 2),
        noise_std=np.full(3, 0.1),
        tool_mass_kg=0.3,
        work_piece_mass_kg=0.2,
    )


def delta_settings(**changes: object) -> TrackerSettings:
    s = TrackerSettings(
        half_window=10,
        poly_order=5,  # exact to degree 5 anywhere in the window, also off its centre, where a command belongs
        max_gap_s=0.01,
        output_period_s=1.0,
        smooth_velocity=SMOOTH_VELOCITY,
        payload_prior_std=np.array([1.0, 1.0]),
        payload_walk_std=np.array([1e-3, 1e-3]),
        friction_walk_std=np.full(3, 1e-3),
        payload_resolution=np.array([0.05, 0.05]),
        friction_resolution=np.full(3, 0.05),
        current_loop_bandwidth_hz=BANDWIDTH_HZ,
        noise_time_constant_s=5.0,
        n_temperatures=1,
        reported_effort=COMMAND,  # a continuous command (no command_period_s): it leads the motion by T
    )
    return dataclasses.replace(s, **changes)


def outputs_equal(a: list[TrackerOutput], b: list[TrackerOutput], *, rtol: float = 0.0) -> None:
    assert len(a) == len(b)
    for oa, ob in zip(a, b, strict=True):
        for f in ("t", "x", "std", "prior_residual", "posterior_residual", "noise_std", "temperature_mean"):
            assert_allclose(getattr(oa, f), getattr(ob, f), rtol=rtol, atol=0.0, err_msg=f)
        assert_array_equal(oa.identifiable, ob.identifiable)
        assert oa.restarts == ob.restarts and oa.dof == ob.dof


def test_delta_recovers_injected_payload_and_friction(delta: DeltaModel, rng: np.random.Generator) -> None:
    # truth: the values injected into the rigid model's efforts (STYLE.md 10, equivalence with the simulation)
    t, q, effort, grip = delta_stream(delta, rng, 12.0)
    tracker = PayloadFrictionTracker(delta, delta_settings(), delta_baseline())
    outputs = tracker.process(t, q, effort, tool_gripping=grip, temperatures=np.full((t.size, 1), 31.0))
    assert len(outputs) == 11  # 12 periods, the last still pending
    last = outputs[-1]
    truth = np.concatenate([[TOOL_KG, WORK_KG], THETA_F])
    assert last.parameter_names[:3] == ("tool_mass", "work_piece_mass", "coulomb_1")
    assert_allclose(last.x, truth, rtol=0.03, atol=0.006)
    assert last.identifiable.all() and not last.out_of_bounds.any()
    assert_allclose(last.temperature_mean, [31.0], rtol=1e-12)
    assert 0.3 < last.gripping_fraction < 0.7
    assert last.noise_std[0] < 0.1  # adaptive R moving from the baseline's 0.1 toward the true 0.05


@pytest.mark.parametrize(("bandwidth_hz", "within", "gain"), [(800.0, 1.1, 1.3), (200.0, 3.0, 1.5)])
def test_command_timing_removes_bias(
    delta: DeltaModel, rng: np.random.Generator, bandwidth_hz: float, within: float, gain: float
) -> None:
    # a streamed command leads the motion by the loop's time constant: declared, the residual comes close to the
    # injected noise (made small, 0.01 N m, so that the model error shows); read as the actual effort (no timing),
    # the same data leave a larger one. The pure delay misses the command's lead u = tau + T dtau/dt where the
    # Coulomb friction changes sign, more so for a slow loop (200 Hz: T = 0.8 ms), hence the looser bound there
    sigma = 0.01
    f = np.full(3, bandwidth_hz)
    t, q, effort, grip = delta_stream(delta, rng, 6.0, sigma=sigma, bandwidth_hz=f)
    timed = PayloadFrictionTracker(
        delta, delta_settings(noise_time_constant_s=None, current_loop_bandwidth_hz=f), delta_baseline()
    )
    assert_allclose(timed.effort_delay_s, -1.0 / (2.0 * np.pi * f), rtol=1e-15)
    untimed = PayloadFrictionTracker(
        delta,
        delta_settings(noise_time_constant_s=None, current_loop_bandwidth_hz=f, reported_effort=None),
        delta_baseline(),
    )
    assert_array_equal(untimed.effort_delay_s, np.zeros(3))
    rms_with = np.sqrt(np.mean(timed.process(t, q, effort, tool_gripping=grip)[-1].posterior_residual ** 2))
    rms_without = np.sqrt(np.mean(untimed.process(t, q, effort, tool_gripping=grip)[-1].posterior_residual ** 2))
    assert rms_with < within * sigma
    assert rms_without > gain * rms_with


def test_actual_effort_needs_no_timing(delta: DeltaModel, rng: np.random.Generator) -> None:
    # the actual effort of a continuously updated command belongs to the motion at its own instant (d = 0): the
    # residual is the injected noise with the default declaration, and a command declaration would be wrong
    sigma = 0.01
    t, q, effort, grip = delta_stream(delta, rng, 6.0, command=False, sigma=sigma)
    actual = PayloadFrictionTracker(
        delta, delta_settings(noise_time_constant_s=None, reported_effort=None), delta_baseline()
    )
    wrong = PayloadFrictionTracker(delta, delta_settings(noise_time_constant_s=None), delta_baseline())
    rms = np.sqrt(np.mean(actual.process(t, q, effort, tool_gripping=grip)[-1].posterior_residual ** 2))
    rms_wrong = np.sqrt(np.mean(wrong.process(t, q, effort, tool_gripping=grip)[-1].posterior_residual ** 2))
    assert rms < 1.3 * sigma
    assert rms_wrong > 2.0 * rms


def test_without_gripping_signal_work_piece_not_identifiable(delta: DeltaModel, rng: np.random.Generator) -> None:
    t, q, effort, _ = delta_stream(delta, rng, 3.0)
    tracker = PayloadFrictionTracker(delta, delta_settings(), delta_baseline())
    out = tracker.process(t, q, effort)[-1]
    assert not out.identifiable[1] and out.identifiable[0]
    assert_allclose(out.std[1], 1.0, rtol=0.01)  # prior std plus a little random walk, no information


def test_standstill_does_not_excite_coulomb_or_viscous(delta: DeltaModel, rng: np.random.Generator) -> None:
    t, q, _, _ = delta_motion(delta, 2.5)
    q = np.broadcast_to(q[:1], q.shape).copy()  # robot at rest
    tau_known, y_p = delta.rigid_regressor(q, np.zeros_like(q), np.zeros_like(q))
    effort = tau_known + TOOL_KG * y_p[:, :, 0] + THETA_F[2::3] + SIGMA_NM * rng.normal(size=q.shape)
    out = PayloadFrictionTracker(delta, delta_settings(), delta_baseline()).process(t, q, effort)[-1]
    names = out.parameter_names
    for i, name in enumerate(names):
        if name.startswith(("coulomb", "viscous")):
            assert not out.identifiable[i], name


def test_split_invariance(delta: DeltaModel, rng: np.random.Generator) -> None:
    t, q, effort, grip = delta_stream(delta, rng, 3.5)
    whole = PayloadFrictionTracker(delta, delta_settings(), delta_baseline())
    ref = whole.process(t, q, effort, tool_gripping=grip) + whole.flush()
    chunked = PayloadFrictionTracker(delta, delta_settings(), delta_baseline())
    cuts = np.unique(np.concatenate([[0, 1, 2, 5], rng.integers(0, t.size, 25), [t.size]]))
    out = []
    for a, b in zip(cuts[:-1], cuts[1:], strict=True):
        out += chunked.process(t[a:b], q[a:b], effort[a:b], tool_gripping=grip[a:b])
    out += chunked.flush()
    outputs_equal(out, ref, rtol=1e-12)


def test_save_restore_continues_bit_identically(delta: DeltaModel, rng: np.random.Generator) -> None:
    t, q, effort, grip = delta_stream(delta, rng, 4.0)
    t[2500:] += 0.2  # a gap, so that a restart is pending at the save
    a = PayloadFrictionTracker(delta, delta_settings(), delta_baseline())
    a.process(t[:2600], q[:2600], effort[:2600], tool_gripping=grip[:2600])
    b = PayloadFrictionTracker(delta, delta_settings(), delta_baseline())
    b.restore_state({k: np.array(v, copy=True) for k, v in a.save_state().items()})
    rest = (t[2600:], q[2600:], effort[2600:])
    out_a = a.process(*rest, tool_gripping=grip[2600:]) + a.flush()
    out_b = b.process(*rest, tool_gripping=grip[2600:]) + b.flush()
    outputs_equal(out_b, out_a)
    assert [r.reason for r in out_a[0].restarts] == [REASON_GAP]
    assert_array_equal(b.filter.state.P, a.filter.state.P)


def test_state_through_bytes_continues_bit_identically(delta: DeltaModel, rng: np.random.Generator) -> None:
    t, q, effort, grip = delta_stream(delta, rng, 2.5)
    a = PayloadFrictionTracker(delta, delta_settings(), delta_baseline())
    a.process(t[:1234], q[:1234], effort[:1234], tool_gripping=grip[:1234])
    saved = a.save_state()
    back = unpack_state(pack_state(saved))
    assert back.keys() == saved.keys()
    for k, v in saved.items():
        assert back[k].dtype == v.dtype and back[k].shape == v.shape, k
        assert_array_equal(back[k], v, err_msg=k)
    b = PayloadFrictionTracker(delta, delta_settings(), delta_baseline())
    b.restore_state(back)
    rest = (t[1234:], q[1234:], effort[1234:])
    outputs_equal(b.process(*rest, tool_gripping=grip[1234:]), a.process(*rest, tool_gripping=grip[1234:]))


def test_state_without_effort_instants_restores(delta: DeltaModel, rng: np.random.Generator) -> None:
    # a state saved before the tracker kept the motion at the efforts' instants still restores: the pending centre
    # samples stand in for it (an approximation for at most one output period), later periods are exact again
    t, q, effort, grip = delta_stream(delta, rng, 3.0)
    a = PayloadFrictionTracker(delta, delta_settings(), delta_baseline())
    a.process(t[:1500], q[:1500], effort[:1500], tool_gripping=grip[:1500])
    old = {k: v for k, v in a.save_state().items() if not k.startswith("pending/effort_")}
    b = PayloadFrictionTracker(delta, delta_settings(), delta_baseline())
    b.restore_state(old)
    assert_array_equal(b.save_state()["pending/effort_q"], b.save_state()["pending/q"])
    out = b.process(t[1500:], q[1500:], effort[1500:], tool_gripping=grip[1500:])
    assert [o.t[0] for o in out] == [
        o.t[0] for o in a.process(t[1500:], q[1500:], effort[1500:], tool_gripping=grip[1500:])
    ]


def test_state_bytes_reject_damage() -> None:
    data = pack_state({"x": np.arange(3.0), "flag": np.array(True), "empty": np.zeros((0, 3))})
    assert_array_equal(unpack_state(data)["empty"], np.zeros((0, 3)))
    with pytest.raises(ConfigurationError, match="truncated"):
        unpack_state(data[:-1])
    with pytest.raises(ConfigurationError, match="trailing"):
        unpack_state(data + b"\0")
    with pytest.raises(ConfigurationError, match="header"):
        unpack_state(b"something else")
    with pytest.raises(ConfigurationError, match="dtype"):
        pack_state({"names": np.array(["a", "b"])})


def test_error_leaves_tracker_unchanged(delta: DeltaModel, rng: np.random.Generator) -> None:
    t, q, effort, grip = delta_stream(delta, rng, 1.5)
    tracker = PayloadFrictionTracker(delta, delta_settings(), delta_baseline())
    tracker.process(t[:700], q[:700], effort[:700], tool_gripping=grip[:700])
    before = tracker.save_state()
    with pytest.raises(ShapeError, match="q: expected shape"):
        tracker.process(t[700:], q[700:, :2], effort[700:])
    after = tracker.save_state()
    assert before.keys() == after.keys()
    for k in before:
        assert_array_equal(after[k], before[k], err_msg=k)


def test_rejects_inconsistent_settings(delta: DeltaModel) -> None:
    with pytest.raises(ConfigurationError, match="payload_prior_std"):
        PayloadFrictionTracker(delta, delta_settings(payload_prior_std=np.ones(3)), delta_baseline())
    with pytest.raises(ConfigurationError, match="current_loop_bandwidth_hz"):
        PayloadFrictionTracker(delta, delta_settings(current_loop_bandwidth_hz=np.zeros(3)), delta_baseline())
    with pytest.raises(ConfigurationError, match="friction_parameters"):
        PayloadFrictionTracker(delta, delta_settings(stribeck_velocity=0.05), delta_baseline())
    with pytest.raises(ConfigurationError, match="reported_effort: expected 3 values, got 2"):
        PayloadFrictionTracker(delta, delta_settings(reported_effort=COMMAND[:2]), delta_baseline())


def test_hexapod_tracks_ten_payload_parameters(rng: np.random.Generator) -> None:
    path = next(p for p in example_paths() if "hexapod" in p.name)
    desc = load_description(path)
    model = build_model(desc)
    assert isinstance(model, HexapodModel)
    theta_p = desc.tool.payload_parameters()
    q_home = model.inverse_kinematics(np.asarray(desc.home_position_m)[None, :], np.eye(3)[None])[0]
    dt = 2.0e-3
    t = np.arange(2000) * dt
    w = 2 * np.pi * np.array([0.9, 1.3, 1.7, 2.1, 2.3, 2.9])
    a = 0.015
    phase = np.outer(t, w) + np.arange(6)
    q, qd, qdd = q_home + a * np.sin(phase), a * w * np.cos(phase), -a * w**2 * np.sin(phase)
    theta_f = np.tile([25.0, 400.0, 2.0], 6)  # demo friction [N, N s/m, N]
    effort = model.inverse_dynamics(q, qd, qdd, theta_p) + friction_effort(qd, theta_f, smooth_velocity=5e-4)
    effort += 0.5 * rng.normal(size=effort.shape)
    baseline = Baseline(
        friction_parameters=theta_f,
        friction_covariance=np.diag((0.1 * theta_f) ** 2),
        noise_std=np.full(6, 0.5),
        tool_mass_kg=3.0,
        work_piece_mass_kg=0.0,
    )
    settings = TrackerSettings(
        half_window=6,
        poly_order=4,  # the legs' reflected rotor inertia (~300 kg) makes qdd errors of a cubic fit visible
        max_gap_s=0.02,
        output_period_s=1.0,
        smooth_velocity=5e-4,
        payload_prior_std=np.array([2.0, 0.2, 0.2, 0.2, 0.05, 0.05, 0.05, 0.05, 0.05, 0.05]),
        payload_walk_std=np.full(10, 1e-4),
        friction_walk_std=np.array([0.1, 1.0, 0.1]),
        payload_resolution=np.array([0.1, 0.01, 0.01, 0.01, 0.01, 0.01, 0.01, 0.01, 0.01, 0.01]),
        friction_resolution=np.array([1.0, 10.0, 1.0]),
    )
    tracker = PayloadFrictionTracker(model, settings, baseline)
    out = tracker.process(t, q, effort)[-1]
    assert len(out.parameter_names) == 10 + 18 and out.parameter_names[0] == "payload_m"
    assert abs(out.x[0] - theta_p[0]) < max(4 * out.std[0], 0.02)  # the mass is well excited by gravity
    assert out.identifiable[0]
    assert np.all(np.abs(out.x - np.concatenate([theta_p, theta_f])) < 5 * out.std + 1e-6)


def test_hexapod_tracks_a_clamped_part_beside_its_fixture(rng: np.random.Generator) -> None:
    """A part clamped while the tool state says so: the filter weighs it apart from the fixture.

    Check against a physical law (common practice, no source): the standard inertial parameters of two rigid bodies
    about one point add, so the payload while gripping is pi_fixture + m_part w with w the part's parameters per kg;
    the effort is computed from that sum by the model's own inverse dynamics, sample by sample."""
    path = next(p for p in example_paths() if "hexapod" in p.name)
    desc = load_description(path)
    model = build_model(desc)
    fixture = desc.tool.payload_parameters()
    w = desc.tool.work_piece_parameters_per_kg()
    assert w is not None and desc.tool.work_piece_mass_kg > 0
    assert_allclose(desc.tool.payload_parameters(gripping=True), fixture + desc.tool.work_piece_mass_kg * w)
    q_home = model.inverse_kinematics(np.asarray(desc.home_position_m)[None, :], np.eye(3)[None])[0]
    dt = 2.0e-3
    t = np.arange(10000) * dt  # 20 s
    omega = 2 * np.pi * np.array([0.9, 1.3, 1.7, 2.1, 2.3, 2.9])
    phase = np.outer(t, omega) + np.arange(6)
    a = 0.015
    q, qd, qdd = q_home + a * np.sin(phase), a * omega * np.cos(phase), -a * omega**2 * np.sin(phase)
    grip = np.floor(t / 0.9) % 2 == 1  # clamped every other 0.9 s
    m_part = 1.15 * desc.tool.work_piece_mass_kg  # heavier than declared: the filter must see it
    theta_f = np.tile([25.0, 400.0, 2.0], 6)
    effort = np.empty_like(q)
    for g in (False, True):
        rows = grip == g
        theta = fixture + (m_part * w if g else 0.0)
        effort[rows] = model.inverse_dynamics(q[rows], qd[rows], qdd[rows], theta)
    effort += friction_effort(qd, theta_f, smooth_velocity=5e-4) + 0.5 * rng.normal(size=effort.shape)
    baseline = Baseline(
        friction_parameters=theta_f,
        friction_covariance=np.diag((0.1 * theta_f) ** 2),
        noise_std=np.full(6, 0.5),
        tool_mass_kg=float(fixture[0]),
        work_piece_mass_kg=desc.tool.work_piece_mass_kg,
        payload_parameters=fixture,
    )
    settings = TrackerSettings(
        half_window=6,
        poly_order=4,
        max_gap_s=0.02,
        output_period_s=1.0,
        smooth_velocity=5e-4,
        payload_prior_std=np.array([2.0, 0.2, 0.2, 0.2, 0.05, 0.05, 0.05, 0.05, 0.05, 0.05, 0.5]),
        payload_walk_std=np.full(11, 1e-4),
        friction_walk_std=np.array([0.1, 1.0, 0.1]),
        payload_resolution=np.array([0.1] + [0.01] * 9 + [0.02]),
        friction_resolution=np.array([1.0, 10.0, 1.0]),
        work_piece_per_kg=w,
    )
    tracker = PayloadFrictionTracker(model, settings, baseline)
    out = tracker.process(t, q, effort, tool_gripping=grip)[-1]
    j = tracker.work_piece_index
    assert j == 10 and out.parameter_names[j] == "work_piece_mass"
    assert out.identifiable[j] and out.identifiable[0]
    assert abs(out.x[j] - m_part) < max(4 * out.std[j], 0.01), (out.x[j], out.std[j])
    assert abs(out.x[0] - fixture[0]) < max(4 * out.std[0], 0.02)  # the fixture is not pulled by the part
    theta_k = tracker.payload_per_sample(out.x, np.array([0.0, 1.0]))
    assert_allclose(theta_k[1] - theta_k[0], out.x[j] * w)
    # without the tool state the part is invisible: flagged, not guessed
    blind = PayloadFrictionTracker(model, settings, baseline)
    out_blind = blind.process(t, q, effort)[-1]
    assert not out_blind.identifiable[j]
    with pytest.raises(ConfigurationError, match="work_piece_per_kg"):
        PayloadFrictionTracker(model, dataclasses.replace(settings, work_piece_per_kg=np.ones(3)), baseline)


def test_baseline_round_trip_and_errors() -> None:
    b = Baseline(
        friction_parameters=np.arange(6.0),
        friction_covariance=np.eye(6),
        noise_std=np.ones(2),
        tool_mass_kg=1.0,
        work_piece_mass_kg=0.5,
        payload_parameters=np.arange(10.0),
    )
    back = Baseline.from_dict(b.to_dict())
    for f in ("friction_parameters", "friction_covariance", "noise_std", "payload_parameters"):
        assert_array_equal(getattr(back, f), getattr(b, f))
    assert (back.tool_mass_kg, back.work_piece_mass_kg) == (1.0, 0.5)
    d = b.to_dict()
    del d["noise_std"]
    with pytest.raises(ConfigurationError, match="noise_std: missing"):
        Baseline.from_dict(d)
    with pytest.raises(ConfigurationError, match="friction_covariance: not positive definite"):
        Baseline.from_dict({**b.to_dict(), "friction_covariance": (-np.eye(6)).tolist()})
    with pytest.raises(ConfigurationError, match="tool_mass_kg: must be >= 0"):
        Baseline.from_dict({**b.to_dict(), "tool_mass_kg": -1.0})


def accumulated_information(outputs: list[TrackerOutput], tracker: PayloadFrictionTracker, p0_diag, memory_s):
    """I_k per output, recomputed from the outputs' own std: P-_ii = P+_(k-1),ii + q_i T_k (random walk, diagonal
    Q), gain = 1 / P+_ii - 1 / P-_ii, I_k = exp(-T_k / tau) I_(k-1) + max(gain, 0) (the settings' docstring)."""
    q_rate = tracker.filter.model.q_rate
    prev_p, prev_t, info, out = np.asarray(p0_diag, dtype=float), None, np.zeros_like(q_rate), []
    for o in outputs:
        span = o.t[-1] - (o.t[0] if prev_t is None else prev_t)
        p_minus = prev_p + q_rate * span
        p_plus = o.std**2
        info = np.exp(-span / memory_s) * info + np.maximum(1.0 / p_plus - 1.0 / p_minus, 0.0)
        out.append(info.copy())
        prev_p, prev_t = p_plus, o.t[-1]
    return out


def test_identifiability_memory_flags_what_several_outputs_pin(delta: DeltaModel, rng: np.random.Generator) -> None:
    t_all, q_all, effort_all, grip_all = delta_stream(delta, rng, 12.0)
    t, q, effort, grip = t_all[:9000], q_all[:9000], effort_all[:9000], grip_all[:9000]
    baseline = delta_baseline()
    plain = PayloadFrictionTracker(delta, delta_settings(), baseline)
    per_batch = plain.process(t, q, effort, tool_gripping=grip)
    p0 = np.concatenate([[1.0, 1.0], np.diag(baseline.friction_covariance)])  # prior variances (payload std 1)
    # per-output information about the tool mass (a memory of 1 ns keeps nothing but the output's own)
    gains = [i[0] for i in accumulated_information(per_batch, plain, p0, 1e-9)]
    resolution = np.array([1.0 / np.sqrt(2.5 * max(gains)), 0.05])  # more than any single output gives
    settings = delta_settings(payload_resolution=resolution, identifiability_memory_s=5.0)
    tracker = PayloadFrictionTracker(delta, settings, baseline)
    outputs = tracker.process(t, q, effort, tool_gripping=grip)
    info = accumulated_information(outputs, tracker, p0, 5.0)
    for o, i in zip(outputs, info, strict=True):
        assert_array_equal(o.identifiable, i >= 1.0 / tracker.filter.model.identifiability_std**2)
    flags = [bool(o.identifiable[0]) for o in outputs]
    assert not flags[0] and flags[-1]  # the tool mass: not pinned by the first output, pinned by several
    without = PayloadFrictionTracker(delta, dataclasses.replace(settings, identifiability_memory_s=None), baseline)
    assert not any(o.identifiable[0] for o in without.process(t, q, effort, tool_gripping=grip))  # per batch: never
    # what no output excites stays unflagged however long the memory: the work piece without a gripping signal
    blind = PayloadFrictionTracker(delta, delta_settings(identifiability_memory_s=1e6), baseline)
    assert not any(o.identifiable[1] for o in blind.process(t, q, effort))
    # a reset (e.g. a payload step) starts the parameter's information afresh
    tracker.reset_information(0)
    more = tracker.process(t_all[9000:], q_all[9000:], effort_all[9000:], tool_gripping=grip_all[9000:])
    assert len(more) == 3 and not more[0].identifiable[0]  # one output's information alone, again
    with pytest.raises(ConfigurationError, match="identifiability_memory_s"):
        PayloadFrictionTracker(delta, delta_settings(identifiability_memory_s=0.0), baseline)
    with pytest.raises(ConfigurationError, match="information: must be >= 0"):
        tracker.reset_information(0, -1.0)


def test_identifiability_memory_survives_save_and_restore(delta: DeltaModel, rng: np.random.Generator) -> None:
    t, q, effort, grip = delta_stream(delta, rng, 4.0)
    settings = delta_settings(identifiability_memory_s=3.0, payload_resolution=np.array([0.001, 0.05]))
    a = PayloadFrictionTracker(delta, settings, delta_baseline())
    a.process(t[:2600], q[:2600], effort[:2600], tool_gripping=grip[:2600])
    saved = a.save_state()
    b = PayloadFrictionTracker(delta, settings, delta_baseline())
    b.restore_state({k: np.array(v, copy=True) for k, v in saved.items()})
    rest = (t[2600:], q[2600:], effort[2600:])
    outputs_equal(
        b.process(*rest, tool_gripping=grip[2600:]) + b.flush(), a.process(*rest, tool_gripping=grip[2600:]) + a.flush()
    )
    old = {k: v for k, v in saved.items() if k != "information"}  # a state saved before the memory existed
    c = PayloadFrictionTracker(delta, settings, delta_baseline())
    c.restore_state(old)
    assert_array_equal(c.save_state()["information"], np.zeros_like(saved["information"]))

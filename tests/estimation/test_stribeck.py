"""The Stribeck term of the friction model: declared in the description, chosen from a run at commissioning,
carried by the baseline, followed by the live monitor."""

from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_allclose

from shadow.cli.commission import _nominal_friction, _stribeck_option
from shadow.errors import ConfigurationError
from shadow.estimation.baseline import Baseline
from shadow.estimation.commissioning import (
    CommissioningSettings,
    baseline_from_identification,
    condition_run,
    identify_stribeck_velocity,
)
from shadow.monitoring import RobotMonitor, default_settings, nominal_baseline, with_friction_form
from shadow.robots.delta import DeltaModel
from shadow.robots.description import (
    EXAMPLES_DIR,
    DescriptionError,
    build_model,
    load_description,
    parse_description,
)
from shadow.robots.friction import friction_effort

DT_S = 1.0e-3
V_S = 0.01  # smooth velocity [rad/s]
V_ST = 0.06  # Stribeck velocity of the synthetic runs [rad/s] (demo value)
TOOL_KG = 0.35  # demo values
THETA_F3 = np.array([0.8, 0.15, 0.05, 0.6, 0.20, -0.04, 1.0, 0.10, 0.02])  # Coulomb, viscous, offset per actuator
F_ST = np.array([0.30, 0.25, 0.35])  # breakaway excess per actuator [N m] (demo values)
SIGMA = np.array([0.03, 0.04, 0.03])  # noise per actuator [N m] (demo values)
# the example delta without its Stribeck lines: a description that declares no term
DELTA_TEXT = "".join(
    line
    for line in (EXAMPLES_DIR / "delta_packaging.toml").read_text().splitlines(keepends=True)
    if not line.startswith("stribeck_")
)
HEXAPOD_TEXT = (EXAMPLES_DIR / "hexapod_inspection.toml").read_text()


@pytest.fixture(scope="module")
def delta() -> DeltaModel:
    model = build_model(load_description(EXAMPLES_DIR / "delta_packaging.toml"))
    assert isinstance(model, DeltaModel)
    return model


def with_stribeck(theta3: np.ndarray, level: np.ndarray) -> np.ndarray:
    """theta_f (4 n,) from (3 n,) Coulomb, viscous, offset and (n,) Stribeck levels."""
    return np.concatenate([theta3.reshape(-1, 3), level[:, None]], axis=1).reshape(-1)


def slow_run(model: DeltaModel, rng: np.random.Generator, level: np.ndarray, n_samples: int = 12000):
    """Joint-space multi-sine about home, slow enough to spend time below and near V_ST; no gripping."""
    t = np.arange(n_samples) * DT_S
    q0 = model.inverse_kinematics(np.array([[0.0, 0.0, -0.8]]))[0]
    w = 2 * np.pi * np.array([0.31, 0.43, 0.57])
    a = np.array([0.25, 0.2, 0.25])
    ph = np.outer(t, w) + np.array([0.0, 1.0, 2.0])
    q = q0 + a * np.sin(ph)
    qd, qdd = a * w * np.cos(ph), -a * w**2 * np.sin(ph)
    tau_known, y_p = model.rigid_regressor(q, qd, qdd)
    theta_f = with_stribeck(THETA_F3, level)
    tau = tau_known + y_p[:, :, 0] * TOOL_KG + friction_effort(qd, theta_f, smooth_velocity=V_S, stribeck_velocity=V_ST)
    effort = tau + SIGMA * rng.normal(size=q.shape)
    return t, q, effort, np.zeros(n_samples, dtype=bool)


def search(model: DeltaModel, rng: np.random.Generator, level: np.ndarray):
    s = CommissioningSettings(smooth_velocity=V_S)
    t, q, effort, grip = slow_run(model, rng, level)
    return identify_stribeck_velocity(model, condition_run(t, q, effort, grip, s), s)


def test_the_stribeck_velocity_of_a_run_is_found(delta: DeltaModel, rng: np.random.Generator) -> None:
    # truth: the v_st and levels injected into the efforts
    found = search(delta, rng, F_ST)
    assert found.velocity is not None and found.velocity == pytest.approx(V_ST, rel=0.15)
    assert found.statistic > found.threshold and "Stribeck term at v_st" in found.reason
    ident = found.identification
    names = ident.parameter_names
    levels = np.array([ident.theta[names.index(f"stribeck_{i + 1}")] for i in range(3)])
    assert_allclose(levels, F_ST, rtol=0.2)
    coulomb = np.array([ident.theta[names.index(f"coulomb_{i + 1}")] for i in range(3)])
    assert_allclose(coulomb, THETA_F3[0::3], rtol=0.05)
    assert_allclose(ident.noise_std, SIGMA, rtol=0.05)  # the term takes up what the Coulomb-viscous form left
    assert found.cost.shape == found.candidates.shape == (9,)
    assert found.cost_without > found.cost.min()


def test_a_run_without_a_hump_keeps_the_term_out(delta: DeltaModel, rng: np.random.Generator) -> None:
    found = search(delta, rng, np.zeros(3))
    assert found.velocity is None
    assert found.statistic <= found.threshold and "does not fit the run better" in found.reason
    assert not any(name.startswith("stribeck_") for name in found.identification.parameter_names)


def test_the_search_refuses_a_bad_range(delta: DeltaModel, rng: np.random.Generator) -> None:
    s = CommissioningSettings(smooth_velocity=V_S)
    t, q, effort, grip = slow_run(delta, rng, F_ST, n_samples=2000)
    run = condition_run(t, q, effort, grip, s)
    with pytest.raises(ConfigurationError, match="Stribeck search: need 0 < low < high"):
        identify_stribeck_velocity(delta, run, s, low=0.1, high=0.01)


def test_the_baseline_carries_the_form_the_run_was_identified_with(delta: DeltaModel, rng: np.random.Generator) -> None:
    found = search(delta, rng, F_ST)
    baseline = baseline_from_identification(
        found.identification, 3, unseen_std=np.ones(12), stribeck_velocity=found.velocity
    )
    assert baseline.stribeck_velocity == found.velocity
    again = Baseline.from_dict(baseline.to_dict())
    assert again.stribeck_velocity == baseline.stribeck_velocity
    assert_allclose(again.friction_parameters, baseline.friction_parameters, rtol=0)
    old_file = {k: v for k, v in baseline.to_dict().items() if k != "stribeck_velocity"}
    with pytest.raises(ConfigurationError, match=r"friction_parameters: expected 9 numbers .* got 12"):
        Baseline.from_dict(old_file)  # 12 numbers without the velocity: the form is not the one they were made for


def test_baseline_refuses_a_bad_stribeck_velocity() -> None:
    good = dict(
        friction_parameters=np.zeros(8),
        friction_covariance=np.eye(8),
        noise_std=np.ones(2),
        tool_mass_kg=0.0,
        work_piece_mass_kg=0.0,
    )
    for bad in (0.0, -1.0, float("nan")):
        with pytest.raises(ConfigurationError, match="stribeck_velocity: must be finite and > 0"):
            Baseline(**good, stribeck_velocity=bad)
    assert Baseline(**good, stribeck_velocity=0.01).friction_parameters.shape == (8,)


def test_the_description_declares_the_term() -> None:
    text = DELTA_TEXT.replace("[friction]", "[friction]\nstribeck_velocity_rad_s = 0.05\nstribeck_nm = [0.2, 0.3, 0.4]")
    friction = parse_description(text).friction
    assert friction is not None and friction.stribeck_velocity == 0.05 and friction.per_actuator == 4
    theta = friction.parameters().reshape(3, 4)
    assert_allclose(theta[:, 3], [0.2, 0.3, 0.4], rtol=0)
    assert_allclose(theta[:, :3].reshape(-1), parse_description(DELTA_TEXT).friction.parameters(), rtol=0)  # type: ignore[union-attr]
    only_velocity = parse_description(DELTA_TEXT.replace("[friction]", "[friction]\nstribeck_velocity_rad_s = 0.05"))
    assert_allclose(only_velocity.friction.parameters().reshape(3, 4)[:, 3], 0.0)  # type: ignore[union-attr]
    with pytest.raises(DescriptionError, match=r"friction\.stribeck_nm: a Stribeck level needs its velocity"):
        parse_description(DELTA_TEXT.replace("[friction]", "[friction]\nstribeck_nm = 0.2"))
    with pytest.raises(DescriptionError, match=r"friction\.stribeck_velocity_rad_s"):
        parse_description(DELTA_TEXT.replace("[friction]", "[friction]\nstribeck_velocity_rad_s = -0.05"))


def test_the_monitor_follows_the_baselines_friction_form() -> None:
    hexapod = parse_description(HEXAPOD_TEXT)
    assert hexapod.friction is not None and hexapod.friction.stribeck_velocity is not None
    nominal = nominal_baseline(hexapod)
    assert nominal.stribeck_velocity == hexapod.friction.stribeck_velocity
    monitor = RobotMonitor("h", hexapod, nominal)
    names = monitor.tracker.parameter_names
    assert "stribeck_6" in names and monitor.tracker.friction_per_actuator == 4
    # a baseline without the term (e.g. commissioned with --stribeck-velocity none) wins over the description
    plain = nominal.without_stribeck()
    assert plain.friction_parameters.shape == (3 * hexapod.n_actuators,) and plain.stribeck_velocity is None
    assert_allclose(plain.friction_parameters, nominal.friction_parameters.reshape(-1, 4)[:, :3].reshape(-1), rtol=0)
    assert plain.without_stribeck() is plain
    monitor = RobotMonitor("h", hexapod, plain)
    assert not any(p.startswith("stribeck_") for p in monitor.tracker.parameter_names)
    assert monitor.settings.tracker.friction_walk_std.shape == (3,)
    # the Stribeck level's walk and resolution are the Coulomb class's
    settings = with_friction_form(default_settings(parse_description(DELTA_TEXT)), 0.05)
    walk, res = settings.tracker.friction_walk_std, settings.tracker.friction_resolution
    assert walk.shape == res.shape == (4,) and walk[3] == walk[0] and res[3] == res[0]


def test_commission_option_and_nominal_form() -> None:
    hexapod = parse_description(HEXAPOD_TEXT)
    delta = parse_description(DELTA_TEXT)
    assert _stribeck_option("described", hexapod) == hexapod.friction.stribeck_velocity  # type: ignore[union-attr]
    assert _stribeck_option("described", delta) is None
    assert _stribeck_option("none", hexapod) is None and _stribeck_option("0.004", delta) == 0.004
    for bad in ("fast", "-1", "inf"):
        with pytest.raises(ConfigurationError, match="--stribeck-velocity"):
            _stribeck_option(bad, delta)
    # the description's friction cut or padded to the form the run is identified with
    assert _nominal_friction(hexapod, None).shape == (18,)  # type: ignore[union-attr]
    padded = _nominal_friction(delta, 0.05)
    assert padded is not None and padded.shape == (12,) and np.all(padded.reshape(3, 4)[:, 3] == 0.0)

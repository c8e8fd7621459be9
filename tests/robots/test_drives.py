"""Drive trains: current <-> effort, reflected inertia, the ball-screw relation, the current-loop lag and when a
reported effort belongs to the motion."""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
import scipy.integrate
import scipy.signal
from numpy.testing import assert_allclose, assert_array_equal

from shadow.errors import OutOfRangeError, ShapeError
from shadow.robots import drives
from shadow.robots.parameters import Drive, MeasuredQuantity, ReportedEffort


def rotary_drive(**kw: float) -> Drive:
    base = dict(
        rotor_inertia_kg_m2=1.2e-4,
        gear_ratio=25.0,
        efficiency=0.9,
        torque_constant_nm_per_a=0.6,
        current_loop_bandwidth_hz=800.0,
        rated_effort=72.0,
    )
    base.update(kw)
    return Drive(**base, measured=MeasuredQuantity.MOTOR_CURRENT)  # type: ignore[arg-type]


def screw_drive(**kw: float) -> Drive:
    base = dict(
        rotor_inertia_kg_m2=5e-5,
        gear_ratio=2.0,
        efficiency=0.85,
        torque_constant_nm_per_a=0.35,
        current_loop_bandwidth_hz=1000.0,
        rated_effort=2500.0,
        screw_lead_m=0.005,
    )
    base.update(kw)
    return Drive(**base)  # type: ignore[arg-type]


# ------------------------------------------------------------------------------------------ ball screw


def test_ball_screw_torque_worked_example() -> None:
    # Ball-screw driving torque T = F h / (2 pi eta) (Shigley, Mechanical Engineering Design, power and
    # ball screws; from memory). Worked by hand: F = 1000 N, h = 5 mm/rev, eta = 0.90:
    # 2 pi 0.90 = 5.65487, 1000 * 0.005 / 5.65487 = 0.88419 N m.
    torque = drives.screw_torque_from_force(np.array([1000.0]), 0.005, 0.90)
    assert_allclose(torque, [0.88419], rtol=1e-5)
    # and back: F = 2 pi eta T / h
    assert_allclose(drives.screw_force_from_torque(torque, 0.005, 0.90), [1000.0], rtol=1e-12)


def test_ball_screw_energy_balance(rng: np.random.Generator) -> None:
    # Physical law (energy balance over one screw turn): eta * T * 2 pi = F * h.
    force = rng.uniform(-3000.0, 3000.0, 20)
    lead, eta = 0.01, 0.8
    torque = drives.screw_torque_from_force(force, lead, eta)
    assert_allclose(eta * torque * 2.0 * np.pi, force * lead, rtol=1e-13)


def test_ball_screw_rejects_bad_efficiency() -> None:
    with pytest.raises(OutOfRangeError, match=r"efficiency: must be in \(0, 1\]"):
        drives.screw_torque_from_force(np.ones(2), 0.005, 1.2)
    with pytest.raises(OutOfRangeError, match="lead_m_per_rev: must be > 0"):
        drives.screw_force_from_torque(np.ones(2), 0.0, 0.9)


# ------------------------------------------------------------------------------------------ current <-> effort


def test_screw_leg_force_from_current_worked_example() -> None:
    # F = eta k_t (2 pi n / h) i, by hand: 0.85 * 0.35 = 0.2975 N m/A at the motor;
    # 2 pi * 2 / 0.005 = 2513.27 rad/m; 0.2975 * 2513.27 = 747.70 N/A; at 2 A: 1495.4 N.
    force = drives.effort_from_current(np.full((1, 1), 2.0), [screw_drive()])
    assert_allclose(force, [[1495.4]], rtol=1e-4)


def test_rotary_torque_from_current_worked_example() -> None:
    # tau = eta k_t n i, by hand: 0.9 * 0.6 * 25 * 1.5 A = 20.25 N m.
    tau = drives.effort_from_current(np.full((1, 1), 1.5), [rotary_drive()])
    assert_allclose(tau, [[20.25]], rtol=1e-12)


@pytest.mark.parametrize("n_samples", [1, 3, 6, 500])
def test_current_effort_round_trip(rng: np.random.Generator, n_samples: int) -> None:
    ds = [rotary_drive(), rotary_drive(gear_ratio=30.0), screw_drive(), screw_drive(screw_lead_m=0.01)]
    current = rng.normal(0.0, 3.0, (n_samples, 4))
    effort = drives.effort_from_current(current, ds)
    assert effort.shape == (n_samples, 4)
    assert_allclose(drives.current_from_effort(effort, ds), current, rtol=1e-13, atol=1e-15)
    # motor torque k_t i, through the transmission with its efficiency, gives the same effort
    torque = current * np.array([d.torque_constant_nm_per_a for d in ds])
    assert_allclose(drives.effort_from_motor_torque(torque, ds), effort, rtol=1e-13)
    assert_allclose(drives.motor_torque_from_effort(effort, ds), torque, rtol=1e-13, atol=1e-15)


def test_motor_torque_of_screw_leg_is_the_ball_screw_relation(rng: np.random.Generator) -> None:
    # With the gear folded into the lead (h / n per motor turn) the motor torque is T = F (h / n) / (2 pi eta)
    # (Shigley's ball-screw relation, from memory).
    d = screw_drive()
    force = rng.uniform(-2000.0, 2000.0, (7, 1))
    expected = drives.screw_torque_from_force(force, d.screw_lead_m / d.gear_ratio, d.efficiency)
    assert_allclose(drives.motor_torque_from_effort(force, [d]), expected, rtol=1e-13)


def test_reflected_inertia_from_kinetic_energy(rng: np.random.Generator) -> None:
    # Physical law: the rotor's kinetic energy J_m w_m^2 / 2 with w_m = G qd equals J_refl qd^2 / 2.
    for d in (rotary_drive(), screw_drive()):
        qd = rng.normal()
        w_m = drives.transmission_ratio(d) * qd
        assert_allclose(drives.reflected_inertia(d) * qd**2 / 2.0, d.rotor_inertia_kg_m2 * w_m**2 / 2.0, rtol=1e-13)
    # delta: J_m n^2 = 1.2e-4 * 625 = 0.075 kg m^2; hexapod: 5e-5 (4 pi / 0.005)^2 = 315.83 kg (by hand)
    assert_allclose(drives.reflected_inertias([rotary_drive(), screw_drive()]), [0.075, 315.83], rtol=1e-4)


def test_effort_shape_error() -> None:
    with pytest.raises(ShapeError, match=r"current_a: expected shape \(N, 2\)"):
        drives.effort_from_current(np.zeros((4, 3)), [rotary_drive(), rotary_drive()])


# ------------------------------------------------------------------------------------------ current loop


def lag_loop(u: np.ndarray, dt: np.ndarray, f: np.ndarray, y0: np.ndarray) -> np.ndarray:
    """The recursion written out sample by sample (the definition, for comparison)."""
    y = np.empty_like(u)
    prev = y0
    for k in range(u.shape[0]):
        prev = prev + (1.0 - np.exp(-2.0 * np.pi * f * dt[k])) * (u[k] - prev)
        y[k] = prev
    return y


def test_zoh_coefficients_match_cont2discrete() -> None:
    # scipy.signal.cont2discrete of 1 / (tau s + 1) with zero-order hold gives A_d = exp(-dt/tau), B_d = 1 - A_d.
    f, dt = 800.0, 1e-3 / 3.0
    tau = 1.0 / (2.0 * np.pi * f)
    num_d, den_d, _ = scipy.signal.cont2discrete(([1.0], [tau, 1.0]), dt, method="zoh")
    # H(z) = b / (z - a): den_d = [1, -a], num_d = [[0, b]]
    a, b = -den_d[1], num_d[0][-1]
    step = drives.current_loop_lag(np.array([[1.0]]), np.array([dt]), np.array([f]), y0=np.array([0.0]))
    assert_allclose(step[0, 0], b, rtol=1e-12)  # one step from 0 with u = 1
    free = drives.current_loop_lag(np.array([[0.0]]), np.array([dt]), np.array([f]), y0=np.array([1.0]))
    assert_allclose(free[0, 0], a, rtol=1e-12)  # free decay from 1


def test_constant_step_matches_lfilter(rng: np.random.Generator) -> None:
    # scipy.signal.lfilter of y_k = a y_{k-1} + b u_k, zi = a y0 gives the same sequence.
    n_samples, f, dt = 3000, np.array([800.0, 150.0, 40.0]), 1e-3
    u = rng.normal(size=(n_samples, 3))
    y0 = rng.normal(size=3)
    y = drives.current_loop_lag(u, np.full(n_samples, dt), f, y0=y0)
    for i in range(3):
        a = np.exp(-2.0 * np.pi * f[i] * dt)
        ref, _ = scipy.signal.lfilter([1.0 - a], [1.0, -a], u[:, i], zi=[a * y0[i]])
        assert_allclose(y[:, i], ref, rtol=1e-10, atol=1e-12)


def test_constant_step_matches_lsim_zero_order_hold(rng: np.random.Generator) -> None:
    # scipy.signal.lsim(1 / (tau s + 1), interp=False) holds u[k] over [t_k, t_{k+1}); our u_k is held over
    # (t_{k-1}, t_k], so lsim sees our input shifted by one sample. With dt_0 = 0 both start at y0.
    n_samples, f, dt = 400, 120.0, 5e-4
    t = dt * np.arange(n_samples)
    u = np.cumsum(rng.normal(size=n_samples))
    y0 = 0.3
    tau = 1.0 / (2.0 * np.pi * f)
    u_lsim = np.concatenate([u[1:], u[-1:]])
    # the state-space form of 1 / (tau s + 1) from scipy has y = x / tau, hence X0 = y0 tau
    _, y_ref, _ = scipy.signal.lsim(([1.0], [tau, 1.0]), u_lsim, t, X0=[y0 * tau], interp=False)
    dts = np.concatenate([[0.0], np.diff(t)])
    y = drives.current_loop_lag(u[:, None], dts, np.array([f]), y0=np.array([y0]))
    assert_allclose(y[:, 0], y_ref, rtol=1e-9, atol=1e-9)


def test_irregular_steps_match_ode_integration(rng: np.random.Generator) -> None:
    # scipy.integrate.solve_ivp of dy/dt = 2 pi f (u - y) with u held constant over each step.
    f = 60.0
    dts = rng.uniform(1e-4, 3e-2, 20)
    u = rng.normal(size=20)
    y0 = 0.5
    ref = []
    y_now = y0
    for k in range(20):
        sol = scipy.integrate.solve_ivp(
            lambda _t, y, uk=u[k]: 2.0 * np.pi * f * (uk - y),
            (0.0, dts[k]),
            [y_now],
            method="DOP853",
            rtol=1e-11,
            atol=1e-13,
        )
        y_now = sol.y[0, -1]
        ref.append(y_now)
    y = drives.current_loop_lag(u[:, None], dts, np.array([f]), y0=np.array([y0]))
    assert_allclose(y[:, 0], ref, rtol=1e-8, atol=1e-10)


@pytest.mark.parametrize("n_samples", [1, 3, 6, 500, 5000])
def test_blocked_scan_matches_recursion(rng: np.random.Generator, n_samples: int) -> None:
    # Irregular steps with repeated time stamps (dt = 0) and long gaps (full reset); 5000 samples use
    # three levels of the blocked scan.
    dts = rng.exponential(1e-3, n_samples)
    dts[rng.random(n_samples) < 0.05] = 0.0
    dts[rng.random(n_samples) < 0.01] = 2.0
    f = np.array([800.0, 5.0, 0.01])
    u = rng.normal(size=(n_samples, 3)) * np.array([1.0, 100.0, 1e-3])
    y0 = rng.normal(size=3)
    y = drives.current_loop_lag(u, dts, f, y0=y0)
    assert y.shape == (n_samples, 3)
    assert_allclose(y, lag_loop(u, dts, f, y0), rtol=1e-10, atol=1e-12 * np.abs(u).max())


def test_default_start_is_settled() -> None:
    # y_{-1} = u_0: a constant input gives a constant output.
    u = np.full((10, 2), [3.0, -1.0])
    y = drives.current_loop_lag(u, np.full(10, 1e-3), np.array([100.0, 10.0]))
    assert_allclose(y, u, rtol=1e-15)


def test_lag_errors() -> None:
    with pytest.raises(ShapeError, match=r"dt_s: expected shape \(4,\)"):
        drives.current_loop_lag(np.zeros((4, 2)), np.zeros(3), np.ones(2))
    with pytest.raises(ShapeError, match=r"bandwidth_hz: expected shape \(2,\)"):
        drives.current_loop_lag(np.zeros((4, 2)), np.zeros(4), np.ones(3))
    with pytest.raises(OutOfRangeError, match="dt_s: steps must be >= 0"):
        drives.current_loop_lag(np.zeros((3, 1)), np.array([1e-3, -1e-3, 1e-3]), np.ones(1))
    with pytest.raises(OutOfRangeError, match="bandwidth_hz: must be finite and > 0"):
        drives.current_loop_lag(np.zeros((3, 1)), np.ones(3), np.zeros(1))


# ------------------------------------------------------------------------------- when a reported effort belongs


@pytest.mark.parametrize(
    ("bandwidth_hz", "period_s"), [(800.0, 1e-3), (300.0, 1e-3), (50.0, 1e-3), (5000.0, 1e-3), (1000.0, 2.5e-4)]
)
def test_reported_effort_delay_against_the_exact_held_response(bandwidth_hz: float, period_s: float) -> None:
    # Reference: the exact response of a first-order lag to a held input (physical law: on [t_k, t_k+1) with
    # u_k held, y(t) = u_k + (y(t_k) - u_k) exp(-(t - t_k) / T)) to a slow sine command. The motion follows y(t);
    # its smooth part is y's fundamental, whose Fourier coefficient over whole periods is the sum of the
    # closed-form integrals of each hold. The actual effort sampled at t_k (before u_k acts) and the command
    # u_k must lag that fundamental by the function's d, to order w^2.
    w = 2.0 * np.pi * 2.0  # 2 Hz: far below the loop and the sample rate
    tc = 1.0 / (2.0 * np.pi * bandwidth_hz)
    n_warm, n_hold = round(1.0 / period_s), round(2.0 / period_s)  # 1 s to settle, then 2 s = 4 periods
    t_k = period_s * np.arange(n_warm + n_hold + 1)
    u = np.sin(w * t_k)
    a = np.exp(-period_s / tc)
    y_k = np.empty(t_k.shape[0])  # y(t_k), the value when u_k takes over
    y_k[0] = u[0]
    for k in range(t_k.shape[0] - 1):  # exact step with u_k held
        y_k[k + 1] = u[k] + (y_k[k] - u[k]) * a
    k = slice(n_warm, n_warm + n_hold)
    c = y_k[k] - u[k]  # transient at the start of each hold
    lam = 1.0 / tc + 1j * w
    # int over [t_k, t_k + h) of (u_k + c_k exp(-(t - t_k) / T)) exp(-j w t) dt, in closed form
    smooth = np.sum(
        np.exp(-1j * w * t_k[k])
        * (u[k] * (1.0 - np.exp(-1j * w * period_s)) / (1j * w) + c * -np.expm1(-lam * period_s) / lam)
    )
    for kind, samples in ((ReportedEffort.ACTUAL, y_k[k]), (ReportedEffort.COMMAND, u[k])):
        sampled = np.sum(samples * np.exp(-1j * w * t_k[k]))  # the same Fourier coefficient of the samples
        measured = np.angle(smooth / sampled) / w  # samples = smooth(t - d): the phase difference over w
        d = drives.reported_effort_delay_s([kind], [bandwidth_hz], [period_s])[0]
        # to first order in w: the lag's own delay atan(w T) / w is T (1 - (w T)^2 / 3), 5e-4 short at 50 Hz
        assert_allclose(d, measured, rtol=1e-3, atol=1e-9, err_msg=str(kind))


def test_reported_effort_delay_limits() -> None:
    # closed-form limits of d = T (x coth x - 1), x = h / (2 T), and d = -(h / 2 + T) (drives module docstring)
    h, f = 1e-3, 800.0
    tc = 1.0 / (2.0 * np.pi * f)
    actual, command = ReportedEffort.ACTUAL, ReportedEffort.COMMAND
    d = drives.reported_effort_delay_s([actual, command], None, [h, h])  # ideal loop: the hold alone
    assert_allclose(d, [0.5 * h, -0.5 * h], rtol=1e-15)
    d = drives.reported_effort_delay_s([actual, command], [f, f], None)  # continuous command: the loop alone
    assert_allclose(d, [0.0, -tc], rtol=1e-15, atol=0.0)
    slow = 1.0 / (2.0 * np.pi * 100.0 * h)  # T = 100 h: d ~ h^2 / (12 T)
    assert_allclose(drives.reported_effort_delay_s([actual], [slow], [h]), [h / 1200.0], rtol=1e-4)
    fast = drives.reported_effort_delay_s([actual], [1e9], [h])  # T << h: h / 2 - T
    assert_allclose(fast, [0.5 * h - 1.0 / (2.0 * np.pi * 1e9)], rtol=1e-12)
    # the example delta (800 Hz, 1 kHz command): 0.31 ms, as the module docstring says
    assert_allclose(drives.reported_effort_delay_s([actual], [f], [h]), [3.08e-4], rtol=2e-3)


def test_reported_effort_delays_of_described_drives() -> None:
    a = rotary_drive()
    b = dataclasses.replace(a, reported=ReportedEffort.COMMAND, command_period_s=1e-3, current_loop_bandwidth_hz=400.0)
    c = dataclasses.replace(a, command_period_s=0.0)  # updated continuously: the actual effort is the motion's
    d = drives.reported_effort_delays_s([a, b, c], 1e-3)  # a holds its command one sample (not declared)
    h, tc = 1e-3, 1.0 / (2.0 * np.pi * a.current_loop_bandwidth_hz)
    x = h / (2.0 * tc)
    assert_allclose(d, [tc * (x / np.tanh(x) - 1.0), -(0.5e-3 + 1.0 / (2.0 * np.pi * 400.0)), 0.0], rtol=1e-12)
    reported, periods = drives.declared_effort_timing([a, b, c], 2e-3)
    assert reported == (ReportedEffort.ACTUAL, ReportedEffort.COMMAND, ReportedEffort.ACTUAL)
    assert_array_equal(periods, [2e-3, 1e-3, 0.0])
    with pytest.raises(OutOfRangeError, match="sample_period_s: must be finite and > 0"):
        drives.declared_effort_timing([a], 0.0)


def test_reported_effort_delay_errors() -> None:
    actual = ReportedEffort.ACTUAL
    with pytest.raises(ShapeError, match=r"bandwidth_hz: expected shape \(2,\)"):
        drives.reported_effort_delay_s([actual, actual], [800.0], None)
    with pytest.raises(OutOfRangeError, match="command_period_s: must be finite and >= 0"):
        drives.reported_effort_delay_s([actual], [800.0], [-1e-3])
    with pytest.raises(OutOfRangeError, match="bandwidth_hz: must be > 0"):
        drives.reported_effort_delay_s([actual], [0.0], None)
    with pytest.raises(OutOfRangeError, match="reported: expected ReportedEffort values"):
        drives.reported_effort_delay_s(["actual"], [800.0], None)  # type: ignore[list-item]

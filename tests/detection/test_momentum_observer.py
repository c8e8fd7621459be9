"""Momentum observer: first-order response to an external step, batching, thresholds, collision events."""

from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy.integrate import solve_ivp
from scipy.signal import lsim
from scipy.stats import norm

from shadow.detection.momentum_observer import (
    CollisionMonitor,
    CollisionSettings,
    MomentumObserver,
    ObserverState,
    alpha_for_false_alarm_rate,
    extreme_value_thresholds,
    find_runs,
    linear_scan,
    observer_inputs,
    observer_step,
    residual_thresholds,
)
from shadow.errors import ConfigurationError, ShapeError, TimeOrderError

G = 9.80665


class TwoLinkArm:
    """Planar two-link arm in a vertical plane, a 2-DOF stand-in with a configuration-dependent M(q).

    Closed forms from Spong, Hutchinson and Vidyasagar, "Robot Modeling and Control" (2006), sec. 7.4.2:
    M = [[a + 2 b cos q2, c + b cos q2], [c + b cos q2, c]],
    a = I1 + I2 + m1 lc1^2 + m2 (l1^2 + lc2^2), b = m2 l1 lc2, c = I2 + m2 lc2^2.
    """

    n_actuators = 2
    n_payload_parameters = 0
    m1, m2, l1, lc1, lc2, I1, I2 = 2.0, 1.2, 0.5, 0.25, 0.2, 0.05, 0.02
    l2 = 0.4

    @property
    def abc(self) -> tuple[float, float, float]:
        a = self.I1 + self.I2 + self.m1 * self.lc1**2 + self.m2 * (self.l1**2 + self.lc2**2)
        return a, self.m2 * self.l1 * self.lc2, self.I2 + self.m2 * self.lc2**2

    def platform_dof(self) -> int:
        return 2

    def mass_matrix(self, q, theta_p):
        a, b, c = self.abc
        c2 = np.cos(q[:, 1])
        M = np.empty((q.shape[0], 2, 2))
        M[:, 0, 0] = a + 2 * b * c2
        M[:, 0, 1] = M[:, 1, 0] = c + b * c2
        M[:, 1, 1] = c
        return M

    def bias_efforts(self, q, qd, theta_p):
        _, b, _ = self.abc
        s2 = np.sin(q[:, 1])
        c1, c12 = np.cos(q[:, 0]), np.cos(q[:, 0] + q[:, 1])
        g1 = (self.m1 * self.lc1 + self.m2 * self.l1) * G * c1 + self.m2 * self.lc2 * G * c12
        g2 = self.m2 * self.lc2 * G * c12
        h1 = -b * s2 * (2 * qd[:, 0] * qd[:, 1] + qd[:, 1] ** 2) + g1  # C qd + g, same text
        h2 = b * s2 * qd[:, 0] ** 2 + g2
        return np.stack((h1, h2), axis=1)

    def mass_matrix_rate(self, q, qd, theta_p):
        _, b, _ = self.abc
        d = -b * np.sin(q[:, 1]) * qd[:, 1]  # d/dt (b cos q2)
        Md = np.zeros((q.shape[0], 2, 2))
        Md[:, 0, 0] = 2 * d
        Md[:, 0, 1] = Md[:, 1, 0] = d
        return Md

    def platform_jacobian(self, q):
        s1, c1 = np.sin(q[:, 0]), np.cos(q[:, 0])
        s12, c12 = np.sin(q[:, 0] + q[:, 1]), np.cos(q[:, 0] + q[:, 1])
        J = np.empty((q.shape[0], 2, 2))  # tip velocity = J qd
        J[:, 0, 0] = -self.l1 * s1 - self.l2 * s12
        J[:, 0, 1] = -self.l2 * s12
        J[:, 1, 0] = self.l1 * c1 + self.l2 * c12
        J[:, 1, 1] = self.l2 * c12
        return J


ARM = TwoLinkArm()
NO_PAYLOAD = np.zeros(0)


def _control(t, q, qd):
    """PD tracking of a smooth trajectory plus gravity feed-forward: a realistic, moving tau(t)."""
    q_ref = np.array([0.4 * np.sin(2.1 * t), 0.6 + 0.5 * np.sin(3.3 * t + 0.4)])
    qd_ref = np.array([0.84 * np.cos(2.1 * t), 1.65 * np.cos(3.3 * t + 0.4)])
    g = ARM.bias_efforts(q[None], np.zeros((1, 2)), NO_PAYLOAD)[0]
    return g + 60.0 * (q_ref - q) + 3.0 * (qd_ref - qd)


def _simulate(t_grid, t_on, t_off, w_ext):
    """Closed-loop arm with an external tip force w_ext applied on [t_on, t_off) (tau_ext = J^T w).

    t_on and t_off must be sample instants (or beyond the grid), so that the force is constant between samples.
    """

    def rhs(t, x, on):
        q, qd = x[:2], x[2:]
        tau = _control(t, q, qd)
        tau_ext = ARM.platform_jacobian(q[None])[0].T @ w_ext if on else np.zeros(2)
        M = ARM.mass_matrix(q[None], NO_PAYLOAD)[0]
        h = ARM.bias_efforts(q[None], qd[None], NO_PAYLOAD)[0]
        return np.concatenate((qd, np.linalg.solve(M, tau + tau_ext - h)))  # M qdd + h = tau + tau_ext

    x0 = np.array([0.0, 0.6 + 0.5 * np.sin(0.4), 0.84, 1.65 * np.cos(0.4)])  # on the reference
    bounds = [t_grid[0], *(b for b in (t_on, t_off) if b < t_grid[-1]), t_grid[-1]]
    pieces = []
    for s, e in zip(bounds[:-1], bounds[1:], strict=True):
        grid = t_grid[(t_grid >= s) & (t_grid <= e)]
        sol = solve_ivp(
            rhs, (s, e), x0, t_eval=grid, args=(t_on <= s < t_off,), rtol=1e-11, atol=1e-12, method="DOP853"
        )
        pieces.append(sol.y.T if not pieces else sol.y.T[1:])  # the shared boundary sample once
        x0 = sol.y[:, -1]
    xs = np.concatenate(pieces)
    q, qd = xs[:, :2], xs[:, 2:]
    tau = np.array([_control(tk, qk, qdk) for tk, qk, qdk in zip(t_grid, q, qd, strict=True)])
    return q, qd, tau


@pytest.fixture(scope="module")
def step_run():
    t = np.arange(0, 1501) * 1e-3
    w_ext = np.array([6.0, -4.0])
    q, qd, tau = _simulate(t, 0.5, np.inf, w_ext)
    return t, q, qd, tau, w_ext


def test_step_response_is_first_order_lag(step_run):
    # De Luca and Mattone (2003), Haddadin et al. (IEEE T-RO 2017): r_dot = K_O (tau_ext - r),
    # so r(t) = tau_ext (1 - exp(-K_O (t - t_s))) for a step of tau_ext at t_s (here along a moving path).
    t, q, qd, tau, w_ext = step_run
    K_O = np.array([40.0, 70.0])
    M, beta = observer_inputs(ARM, q, qd, NO_PAYLOAD)
    r, _ = observer_step(None, t, tau, M, beta, qd, K_O)
    tau_ext = np.einsum("kji,j->ki", ARM.platform_jacobian(q), w_ext)  # J^T w, changes as the arm moves
    lag = np.clip(1.0 - np.exp(-K_O[None, :] * (t[:, None] - 0.5)), 0.0, None)
    # The external effort J(q)^T w itself varies slowly along the path; the lag applies to it, so compare
    # with the filtered effort, computed independently by ODE integration of r_dot = K_O (tau_ext - r).
    from scipy.interpolate import interp1d

    f = interp1d(t, tau_ext, axis=0, kind="cubic")
    ref = solve_ivp(
        lambda s, x: K_O * ((f(s) if s >= 0.5 else 0.0) - x),
        (0.0, 1.5),
        np.zeros(2),
        t_eval=t,
        rtol=1e-10,
        atol=1e-12,
        max_step=1e-3,
    ).y.T
    err = np.abs(r - ref).max() / np.abs(tau_ext).max()
    assert err < 1e-4, err
    # and close to the textbook constant-step curve once tau_ext is nearly constant right after the step
    early = (t >= 0.5) & (t <= 0.52)
    assert_allclose(r[early], (tau_ext[early][0] * lag[early]), atol=0.02 * np.abs(tau_ext).max())
    assert_allclose(r[t < 0.5], 0.0, atol=2e-5 * np.abs(tau_ext).max())  # O(dt^2) trapezoid error


def test_constant_mass_step_tight():
    # 1-DOF with constant M at rest: the discretisation (1) is exact for a step on a sample instant, so
    # r_k = tau_ext (1 - exp(-K_O (t_k - t_s))) to rounding (De Luca and Mattone 2003).
    t = np.linspace(0.0, 1.0, 1001)
    K_O = np.array([25.0])
    tau_ext = 3.0
    m = 2.5
    qd = np.where(t >= 0.3, tau_ext / m * (t - 0.3), 0.0)[:, None]  # m qdd = tau_ext, tau = 0, beta = 0
    M = np.full((t.size, 1, 1), m)
    r, _ = observer_step(None, t, np.zeros((t.size, 1)), M, np.zeros((t.size, 1)), qd, K_O)
    expected = tau_ext * np.clip(1.0 - np.exp(-K_O[0] * (t - 0.3)), 0.0, None)
    assert_allclose(r[:, 0], expected, rtol=0, atol=1e-11)


def _loop_reference(t, tau, M, beta, qd, K_O):
    """The recursion (1) written sample by sample."""
    n = K_O.size
    r = np.zeros((t.size, n))
    p = np.einsum("kij,kj->ki", M, qd)
    u = tau - beta
    for k in range(1, t.size):
        dt = t[k] - t[k - 1]
        a = np.exp(-K_O * dt)
        w = (p[k] - p[k - 1]) / dt - 0.5 * (u[k] + u[k - 1])
        r[k] = a * r[k - 1] + (1 - a) * w
    return r


@pytest.mark.parametrize("n_samples", [1, 3, 6, 500])
def test_batch_matches_loop(step_run, n_samples):
    t, q, qd, tau, _ = step_run
    sl = slice(480, 480 + n_samples)
    M, beta = observer_inputs(ARM, q[sl], qd[sl], NO_PAYLOAD)
    K_O = np.array([40.0, 70.0])
    r, state = observer_step(None, t[sl], tau[sl], M, beta, qd[sl], K_O)
    assert r.shape == (n_samples, 2)
    assert_allclose(r, _loop_reference(t[sl], tau[sl], M, beta, qd[sl], K_O), rtol=1e-12, atol=1e-12)
    assert_allclose(state.r, r[-1], rtol=0, atol=0)


def test_wrapper_in_chunks_matches_one_batch(step_run, rng):
    t, q, qd, tau, _ = step_run
    M, beta = observer_inputs(ARM, q, qd, NO_PAYLOAD)
    K_O = np.array([40.0, 70.0])
    whole, _ = observer_step(None, t, tau, M, beta, qd, K_O)
    obs = MomentumObserver(K_O)
    cuts = np.sort(rng.choice(np.arange(1, t.size), size=9, replace=False))
    parts = []
    for s, e in zip(np.r_[0, cuts], np.r_[cuts, t.size], strict=True):
        saved = obs.save()
        fresh = MomentumObserver(K_O)
        fresh.restore(saved)  # save/restore between every batch
        parts.append(fresh.update(t[s:e], tau[s:e], M[s:e], beta[s:e], qd[s:e]))
        obs = fresh
    assert_allclose(np.concatenate(parts), whole, rtol=1e-12, atol=1e-12)


def test_linear_scan_long_and_with_gaps(rng):
    # Over many block lengths and with a long gap (a -> 0), against the plain loop.
    n = 30000
    a = np.exp(-80.0 * np.full((n, 3), 1e-3) * np.array([1.0, 0.5, 2.0]))
    a[12345] = 0.0
    b = rng.normal(size=(n, 3))
    y0 = np.array([1.0, -2.0, 0.5])
    y = linear_scan(a, b, y0)
    ref = np.empty_like(b)
    prev = y0
    for k in range(n):
        prev = a[k] * prev + b[k]
        ref[k] = prev
    assert_allclose(y, ref, rtol=1e-9, atol=1e-11)


def test_nonuniform_sampling_constant_mass():
    # Same exact step response on jittered timestamps (1-DOF, constant M).
    t = np.cumsum(np.r_[0.0, np.random.default_rng(3).uniform(0.5e-3, 1.5e-3, 999)])
    t_s = t[300]
    m, tau_ext, K = 1.5, -2.0, np.array([30.0])
    qd = np.where(t >= t_s, tau_ext / m * (t - t_s), 0.0)[:, None]
    r, _ = observer_step(None, t, np.zeros((t.size, 1)), np.full((t.size, 1, 1), m), np.zeros((t.size, 1)), qd, K)
    assert_allclose(r[:, 0], tau_ext * np.clip(1 - np.exp(-K[0] * (t - t_s)), 0, None), atol=1e-11)


def test_rejects_bad_inputs():
    t = np.arange(5) * 1e-3
    z = np.zeros((5, 2))
    M = np.tile(np.eye(2), (5, 1, 1))
    with pytest.raises(ShapeError, match="beta: expected shape"):
        observer_step(None, t, z, M, np.zeros((5, 3)), z, np.ones(2))
    with pytest.raises(TimeOrderError, match="sample 3"):
        observer_step(None, t[[0, 1, 2, 2, 4]], z, M, z, z, np.ones(2))
    with pytest.raises(ConfigurationError, match="K_O"):
        MomentumObserver(np.array([1.0, -1.0]))
    state = ObserverState(t_s=1.0, p=np.zeros(2), u=np.zeros(2), r=np.zeros(2))
    with pytest.raises(TimeOrderError, match="does not follow"):
        observer_step(state, t, z, M, z, z, np.ones(2))


def test_threshold_gaussian_tail(rng):
    # Gaussian tail: a fraction alpha of samples of a Gaussian residual lies beyond z_(1-alpha/2) sigma_r
    # (scipy.stats.norm); the residual here is the observer's own response to white effort noise.
    n = 200_000
    t = np.arange(n) * 1e-3
    tau = rng.normal(scale=0.5, size=(n, 1))
    M = np.ones((n, 1, 1))
    r, _ = observer_step(None, t, tau, M, np.zeros((n, 1)), np.zeros((n, 1)), np.array([50.0]))
    alpha = 0.01
    thr = residual_thresholds(r[: n // 2], alpha, settle_samples=500)
    frac = np.mean(np.abs(r[n // 2 :, 0]) > thr[0])
    assert thr[0] == pytest.approx(norm.ppf(1 - alpha / 2) * r[500 : n // 2, 0].std(ddof=1), rel=1e-12)
    assert frac == pytest.approx(alpha, rel=0.25)  # ~10k independent samples at 20 ms correlation
    # the documented bound: alarm starts (runs above threshold) are at most the exceeding samples, alpha N
    starts, _ = find_runs(t[n // 2 :], np.abs(r[n // 2 :, 0]) > thr[0], merge_gap_s=0.0)
    assert 0 < starts.size <= alpha * (n // 2)
    assert alpha_for_false_alarm_rate(3.6, 1000.0) == pytest.approx(1e-6)


def _monitor(thr=1.0):
    settings = CollisionSettings(
        threshold=np.full(2, thr), rated_effort=np.array([20.0, 10.0]), min_duration_s=0.01, evidence_before_s=0.5
    )
    return CollisionMonitor(np.array([40.0, 70.0]), settings, jacobian=ARM.platform_jacobian)


def test_collision_event_and_wrench():
    # Collision record: the least-squares force through J^T w = r (virtual work) recovers the applied force.
    t = np.arange(0, 1501) * 1e-3
    w_ext = np.array([6.0, -4.0])
    q, qd, tau = _simulate(t, 0.5, 1.0, w_ext)
    M, beta = observer_inputs(ARM, q, qd, NO_PAYLOAD)
    mon = _monitor()
    _, first = mon.update(t[:800], tau[:800], M[:800], beta[:800], qd[:800], q[:800])
    assert first == []  # still above threshold at the end of the batch: held back
    _, events = mon.update(t[800:], tau[800:], M[800:], beta[800:], qd[800:], q[800:])
    assert len(events) == 1
    ev = events[0]
    assert ev.start_time_s == pytest.approx(0.5, abs=0.02)
    assert 1.0 <= ev.end_time_s <= 1.1
    k = ev.peak_index
    tau_ext = ARM.platform_jacobian(q[k : k + 1])[0].T @ w_ext
    assert_allclose(ev.residual_at_peak, tau_ext, rtol=0.05)
    assert_allclose(ev.external_wrench, w_ext, rtol=0.05)
    assert ev.wrench_misfit == pytest.approx(0.0, abs=1e-9)  # square, regular J
    assert_allclose(ev.q_at_peak, q[k], rtol=0, atol=0)
    assert_allclose(ev.relative_peak, np.abs(ev.peak_residual) / np.array([20.0, 10.0]), rtol=1e-12)
    assert ev.evidence_start_time_s == pytest.approx(ev.start_time_s - 0.5)
    assert ev.evidence_start_index == ev.start_index - 500


def test_collision_events_same_in_chunks(step_run):
    t, q, qd, tau, _ = step_run
    M, beta = observer_inputs(ARM, q, qd, NO_PAYLOAD)
    tau_hit = tau.copy()
    tau_hit[200:260] -= np.array([3.0, -2.0])  # a short unmodelled effort (a hit), seen as a residual
    whole = _monitor()
    _, ev_whole = whole.update(t, tau_hit, M, beta, qd, q)
    chunked = _monitor()
    ev_chunks = []
    for s in range(0, t.size, 37):
        state = chunked.save()
        chunked = _monitor()
        chunked.restore(state)
        ev_chunks += chunked.update(
            t[s : s + 37], tau_hit[s : s + 37], M[s : s + 37], beta[s : s + 37], qd[s : s + 37], q[s : s + 37]
        )[1]
    assert len(ev_whole) >= 1
    assert [e.start_index for e in ev_whole] == [e.start_index for e in ev_chunks]
    assert [e.end_index for e in ev_whole] == [e.end_index for e in ev_chunks]
    assert_allclose(ev_whole[0].peak_residual, ev_chunks[0].peak_residual, rtol=1e-12)


def test_short_blip_is_ignored():
    t = np.arange(1000) * 1e-3
    r_blip = np.zeros((1000, 1))
    M = np.ones((1000, 1, 1))
    qd = np.zeros((1000, 1))
    tau = np.zeros((1000, 1))
    tau[500] = -100.0  # one-sample spike: residual above threshold for about 20 ms
    settings = CollisionSettings(threshold=np.array([1.0]), rated_effort=np.array([5.0]), min_duration_s=0.05)
    mon = CollisionMonitor(np.array([50.0]), settings)
    r, events = mon.update(t, tau, M, r_blip, qd, qd)
    assert np.abs(r).max() > 1.0
    assert events == []


def _example(family):
    from shadow.robots.description import build_model, example_paths, load_description

    desc = next(d for d in map(load_description, example_paths()) if d.family == family)
    model = build_model(desc)
    home = np.asarray(desc.home_position_m)[None]
    q0 = model.inverse_kinematics(home) if family == "delta" else model.inverse_kinematics(home, np.eye(3)[None])
    rated = np.array([d.rated_effort for d in desc.parameters.drives])
    return model, q0[0], desc.tool.payload_parameters(gripping=True), rated


@pytest.mark.parametrize(
    ("family", "amplitude", "w_ext"),
    [
        ("delta", 0.12, np.array([15.0, -10.0, 25.0])),  # platform force [N]
        ("hexapod", 0.015, np.array([40.0, -30.0, 60.0, 3.0, -2.0, 1.5])),  # wrench [N, N m]
    ],
)
def test_real_models_step_and_wrench(family, amplitude, w_ext):
    # Prescribed motion through the example robots: the drives deliver tau = ID(q, qd, qdd) - J^T w while the
    # platform is pushed by w (momentum balance dp/dt = tau + J^T w - beta), so the residual must follow
    # J^T w with the first-order lag of De Luca and Mattone (2003), and the least-squares wrench of the
    # collision record must return w (virtual work, J^T w = tau_ext).
    model, q0, theta_p, rated = _example(family)
    n = q0.size
    t = np.arange(0, 1301) * 1e-3
    f = 0.7 + 0.1 * np.arange(n)
    ph = np.arange(n) * 0.9
    wt = 2 * np.pi * f[None, :] * t[:, None] + ph[None, :]
    q = q0[None, :] + amplitude * np.sin(wt)
    qd = amplitude * 2 * np.pi * f * np.cos(wt)
    qdd = -amplitude * (2 * np.pi * f) ** 2 * np.sin(wt)
    J = model.platform_jacobian(q)
    on = ((t >= 0.5) & (t < 1.0)).astype(float)[:, None]
    tau_ext = np.einsum("kji,j->ki", J, w_ext) * on  # J^T w while pushed
    tau = model.inverse_dynamics(q, qd, qdd, theta_p) - tau_ext
    M, beta = observer_inputs(model, q, qd, theta_p)
    K_O = np.full(n, 100.0)
    r, _ = observer_step(None, t, tau, M, beta, qd, K_O)
    scale = np.abs(tau_ext).max()
    assert_allclose(r[t < 0.5], 0.0, atol=1e-4 * scale)  # O(dt^2) trapezoid error only
    # reference: scipy.signal.lsim of K_O / (s + K_O) driven by the sampled J^T w (first-order hold, i.e. the
    # same trapezoidal reading of a switch between two samples)
    ref = np.stack([lsim(([K_O[i]], [1.0, K_O[i]]), tau_ext[:, i], t)[1] for i in range(n)], axis=1)
    assert np.abs(r - ref).max() < 2e-3 * scale, np.abs(r - ref).max() / scale
    thr = np.full(n, 0.05 * scale)
    settings = CollisionSettings(threshold=thr, rated_effort=rated)
    mon = CollisionMonitor(K_O, settings, jacobian=model.platform_jacobian)
    _, events = mon.update(t, tau, M, beta, qd, q)
    assert len(events) == 1
    ev = events[0]
    assert ev.external_wrench.shape == (model.platform_dof(),)
    assert_allclose(ev.external_wrench, w_ext, rtol=0.03, atol=0.01 * np.abs(w_ext).max())
    assert 0.5 <= ev.start_time_s <= 0.51 and 1.0 <= ev.end_time_s <= 1.1
    assert_allclose(ev.relative_peak, np.abs(ev.peak_residual) / rated, rtol=1e-12)


@pytest.mark.parametrize("p", [1e-2, 1e-4])
def test_extreme_value_thresholds_match_the_exact_maximum_of_gaussian_noise(p: float) -> None:
    # Reference: the maximum of m independent |N(0, s)| samples exceeds x with probability
    # 1 - (1 - 2 Q(x / s))^m (order statistics of iid samples), so x = s Q^-1((1 - (1 - p)^(1/m)) / 2), from
    # scipy.stats.norm. The Gumbel fit (Coles 2001, ch. 3) approaches it from above: Gaussian maxima converge to
    # the Gumbel law slowly and from the lighter-tailed side, so the extrapolation errs on the safe side.
    rng = np.random.default_rng(20240601)
    sigma, m = np.array([0.1, 0.3]), 1000
    residual = rng.normal(0.0, sigma, size=(200 * m, 2))
    thr = extreme_value_thresholds(residual, block_samples=m, exceedance_per_block=p)
    exact = sigma * norm.isf((1.0 - (1.0 - p) ** (1.0 / m)) / 2.0)
    assert np.all(thr >= 0.97 * exact) and np.all(thr <= 1.25 * exact)


def test_extreme_value_thresholds_need_enough_blocks() -> None:
    with pytest.raises(ShapeError, match="need at least 20"):
        extreme_value_thresholds(np.zeros((1900, 3)), block_samples=100, exceedance_per_block=1e-3)
    with pytest.raises(ConfigurationError, match="exceedance_per_block"):
        extreme_value_thresholds(np.zeros((5000, 3)), block_samples=100, exceedance_per_block=1.5)

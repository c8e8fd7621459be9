"""Savitzky-Golay conditioning: weights, delay, gain, exactness, gaps, streaming, state, and the motion at the
instants the efforts belong to."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.signal
from numpy.testing import assert_allclose, assert_array_equal

from shadow.errors import ConfigurationError, ShapeError
from shadow.estimation.conditioning import (
    REASON_GAP,
    REASON_NOT_INCREASING,
    ConditionedBatch,
    Conditioner,
    EffortMotion,
    effort_groups,
    local_derivatives,
    local_motion,
    regressor_at_efforts,
    savgol_weights,
)
from shadow.robots.description import build_model, example_paths, load_description

DT_S = 1.0e-3


def make_conditioner(n: int = 2, m: int = 5, d: int = 3, max_gap_s: float = 0.01) -> Conditioner:
    return Conditioner(n, {"effort": n, "temp": 1}, half_window=m, poly_order=d, max_gap_s=max_gap_s)


def stream(rng: np.random.Generator, n_samples: int, n: int = 2) -> tuple[np.ndarray, ...]:
    t = 10.0 + np.cumsum(DT_S * (1.0 + 0.2 * rng.uniform(-1, 1, n_samples)))  # jittered clock
    q = np.sin(np.outer(t, np.arange(1, n + 1))) + 0.01 * rng.normal(size=(n_samples, n))
    effort = rng.normal(size=(n_samples, n))
    temp = rng.normal(size=(n_samples, 1))
    return t, q, effort, temp


def feed(c: Conditioner, t, q, effort, temp) -> ConditionedBatch:
    return c.feed(t, q, {"effort": effort, "temp": temp})


def concat(batches: list[ConditionedBatch]) -> dict[str, np.ndarray]:
    return {
        "t": np.concatenate([b.t for b in batches]),
        "q": np.concatenate([b.q for b in batches]),
        "qd": np.concatenate([b.qd for b in batches]),
        "qdd": np.concatenate([b.qdd for b in batches]),
        "effort": np.concatenate([b.channels["effort"] for b in batches]),
        "temp": np.concatenate([b.channels["temp"] for b in batches]),
        "segment_start": np.concatenate([b.segment_start for b in batches]),
    }


@pytest.mark.parametrize(("m", "d"), [(2, 2), (5, 3), (7, 4), (10, 3)])
@pytest.mark.parametrize("deriv", [1, 2])
def test_weights_match_scipy_savgol_coeffs(m: int, d: int, deriv: int) -> None:
    # reference: scipy.signal.savgol_coeffs (use="dot": oldest sample first, evaluated at the centre)
    ref = scipy.signal.savgol_coeffs(2 * m + 1, d, deriv=deriv, delta=DT_S, use="dot")
    assert_allclose(savgol_weights(m, d, deriv, DT_S), ref, rtol=1e-9, atol=1e-12 * np.abs(ref).max())


def test_uniform_local_fit_is_savgol(rng: np.random.Generator) -> None:
    # on a uniform grid the per-sample fit must be the classic filter: scipy.signal.savgol_coeffs weights
    m, d, n_windows = 6, 3, 40
    t_win = 5.0 + DT_S * (np.arange(2 * m + 1)[None, :] + np.arange(n_windows)[:, None])
    y_win = rng.normal(size=(n_windows, 2 * m + 1, 3))
    yd, ydd = local_derivatives(t_win, y_win, d)
    w1 = scipy.signal.savgol_coeffs(2 * m + 1, d, deriv=1, delta=DT_S, use="dot")
    w2 = scipy.signal.savgol_coeffs(2 * m + 1, d, deriv=2, delta=DT_S, use="dot")
    assert_allclose(yd, np.einsum("w,kwn->kn", w1, y_win), rtol=1e-8, atol=1e-8 * np.abs(yd).max())
    assert_allclose(ydd, np.einsum("w,kwn->kn", w2, y_win), rtol=1e-8, atol=1e-8 * np.abs(ydd).max())


@pytest.mark.parametrize("d", [2, 3, 4])
def test_polynomial_derivatives_exact_on_irregular_grid(rng: np.random.Generator, d: int) -> None:
    # a least-squares polynomial of degree d reproduces any polynomial of degree <= d exactly (Schafer 2011)
    c = Conditioner(1, {}, half_window=4, poly_order=d, max_gap_s=1.0)
    t = np.cumsum(0.01 * (1.0 + 0.4 * rng.uniform(-1, 1, 200)))
    coef = rng.normal(size=d + 1)
    poly = np.polynomial.Polynomial(coef)
    out = c.feed(t, poly(t)[:, None], {})
    assert_allclose(out.qd[:, 0], poly.deriv(1)(out.t), rtol=1e-8, atol=1e-8)
    assert_allclose(out.qdd[:, 0], poly.deriv(2)(out.t), rtol=1e-7, atol=1e-7)


def test_delay_and_gain_of_a_sinusoid() -> None:
    # steady-state response of the derivative filter to sin(w t): A(w) cos(w t_c), with the zero-phase gain
    # A(w) = sum_j w_j sin(w j dt) of the scipy.signal.savgol_coeffs weights (DTFT of an odd kernel)
    m, d, w = 8, 3, 2 * np.pi * 15.0
    c = Conditioner(1, {"effort": 1}, half_window=m, poly_order=d, max_gap_s=1.0)
    t = np.arange(1000) * DT_S
    out = c.feed(t, np.sin(w * t)[:, None], {"effort": t[:, None]})
    assert c.delay_samples == m
    assert out.n_samples == t.size - 2 * m  # the newest m samples are still waiting for their windows
    assert_array_equal(out.t, t[m:-m])
    assert_array_equal(out.channels["effort"][:, 0], out.t)  # every channel aligned on the centre sample
    j = np.arange(-m, m + 1)
    w1 = scipy.signal.savgol_coeffs(2 * m + 1, d, deriv=1, delta=DT_S, use="dot")
    w2 = scipy.signal.savgol_coeffs(2 * m + 1, d, deriv=2, delta=DT_S, use="dot")
    gain1 = np.sum(w1 * np.sin(w * j * DT_S))
    gain2 = np.sum(w2 * np.cos(w * j * DT_S))
    assert_allclose(out.qd[:, 0], gain1 * np.cos(w * out.t), rtol=0, atol=1e-9 * w)
    assert_allclose(out.qdd[:, 0], gain2 * np.sin(w * out.t), rtol=0, atol=1e-6 * w**2)
    assert 0.9 * w < gain1 < 1.01 * w  # and the gain is close to the ideal differentiator's at this frequency


def test_split_invariance(rng: np.random.Generator) -> None:
    t, q, effort, temp = stream(rng, 1200)
    t[400:] += 0.05  # one gap
    t[900:] -= 0.002  # one backward step
    whole = concat([feed(make_conditioner(), t, q, effort, temp)])
    c = make_conditioner()
    cuts = np.unique(np.concatenate([[0, 1, 2, 3, 7], rng.integers(0, 1200, 60), [1200]]))
    parts = [feed(c, t[a:b], q[a:b], effort[a:b], temp[a:b]) for a, b in zip(cuts[:-1], cuts[1:], strict=True)]
    chunked = concat(parts)
    for key, value in whole.items():
        assert_allclose(chunked[key], value, rtol=1e-12, atol=1e-12, err_msg=key)


def test_gap_restarts_conditioning(rng: np.random.Generator) -> None:
    m = 5
    t, q, effort, temp = stream(rng, 300)
    t[120:] += 0.5  # gap of about 0.5 s > max_gap_s
    c = make_conditioner(m=m)
    out = feed(c, t[:125], q[:125], effort[:125], temp[:125])
    assert [r.reason for r in out.restarts] == [REASON_GAP]
    assert out.restarts[0].t_s == t[120]
    assert_allclose(out.restarts[0].gap_s, t[120] - t[119], rtol=1e-15)
    assert_array_equal(out.t, t[m : 120 - m])  # no window spans the gap; the new segment is still filling
    out2 = feed(c, t[125:], q[125:], effort[125:], temp[125:])
    assert out2.restarts == ()
    assert_array_equal(out.restart_before, [out.n_samples])  # its first output comes with a later batch
    assert out2.t[0] == t[120 + m]  # resumes once 2 m + 1 samples of the new segment are in
    assert_array_equal(np.flatnonzero(out2.segment_start), [0])
    assert out.segment_start[0] and not out.segment_start[1:].any()


def test_non_increasing_time_restarts(rng: np.random.Generator) -> None:
    t, q, effort, temp = stream(rng, 100)
    t[50] = t[49]  # repeated time stamp
    out = feed(make_conditioner(), t, q, effort, temp)
    assert [r.reason for r in out.restarts] == [REASON_NOT_INCREASING]
    assert out.restarts[0].gap_s == 0.0
    (j,) = out.restart_before
    assert out.t[j] == t[50 + 5] and out.segment_start[j]  # the restart precedes the new segment's first output


def test_save_restore_exact(rng: np.random.Generator) -> None:
    t, q, effort, temp = stream(rng, 200)
    a = make_conditioner()
    feed(a, t[:97], q[:97], effort[:97], temp[:97])
    b = make_conditioner()
    b.restore_state({k: v.copy() for k, v in a.save_state().items()})
    out_a = concat([feed(a, t[97:], q[97:], effort[97:], temp[97:])])
    out_b = concat([feed(b, t[97:], q[97:], effort[97:], temp[97:])])
    for key in out_a:
        assert_array_equal(out_b[key], out_a[key], err_msg=key)


@pytest.mark.parametrize("n_samples", [1, 3, 6, 500])
def test_batch_matches_loop(rng: np.random.Generator, n_samples: int) -> None:
    width = 9
    t_win = np.sort(rng.uniform(0, 0.01, (n_samples, width)), axis=1)
    y_win = rng.normal(size=(n_samples, width, 3))
    yd, ydd = local_derivatives(t_win, y_win, 3)
    assert yd.shape == ydd.shape == (n_samples, 3)
    for k in range(n_samples):
        yd_k, ydd_k = local_derivatives(t_win[k : k + 1], y_win[k : k + 1], 3)
        assert_allclose(yd[k], yd_k[0], rtol=1e-12, atol=1e-9)
        assert_allclose(ydd[k], ydd_k[0], rtol=1e-12, atol=1e-6)


def test_short_batches_return_empty_outputs_of_fixed_width(rng: np.random.Generator) -> None:
    t, q, effort, temp = stream(rng, 4, n=3)
    c = Conditioner(3, {"effort": 3, "temp": 1}, half_window=5, poly_order=3, max_gap_s=0.01)
    out = c.feed(t, q, {"effort": effort, "temp": temp})
    assert out.qd.shape == (0, 3) and out.channels["effort"].shape == (0, 3) and out.t.shape == (0,)


def test_rejects_bad_input(rng: np.random.Generator) -> None:
    t, q, effort, temp = stream(rng, 20)
    c = make_conditioner()
    with pytest.raises(ShapeError, match="q: expected shape"):
        c.feed(t, q[:, :1], {"effort": effort, "temp": temp})
    with pytest.raises(ShapeError, match="effort: expected shape"):
        c.feed(t, q, {"effort": effort[:-1], "temp": temp})
    with pytest.raises(ShapeError, match="channels: expected"):
        c.feed(t, q, {"effort": effort})
    with pytest.raises(ConfigurationError, match="poly_order"):
        Conditioner(2, {}, half_window=3, poly_order=1, max_gap_s=0.01)
    with pytest.raises(ConfigurationError, match="max_gap_s"):
        Conditioner(2, {}, half_window=3, poly_order=2, max_gap_s=0.0)


@pytest.mark.parametrize("d", [2, 3, 5])
def test_local_motion_exact_on_polynomials_off_centre(rng: np.random.Generator, d: int) -> None:
    # reference: numpy.polynomial.Polynomial and its derivatives; the least-squares polynomial of degree d
    # reproduces a polynomial of degree <= d, so its value and derivatives anywhere in the window are exact
    width, n_windows = 11, 30
    t_win = np.sort(rng.uniform(0.0, 0.02, (n_windows, width)), axis=1) + 3.0
    poly = [np.polynomial.Polynomial(rng.normal(size=d + 1) * [1.0, 50.0, 2e3, 5e4, 1e6, 3e7][: d + 1]) for _ in "ab"]
    centre = t_win[:, width // 2]
    y_win = np.stack([p(t_win - 3.0) for p in poly], axis=2)
    offset = rng.uniform(-1.0, 1.0, n_windows) * 0.5 * (t_win[:, -1] - t_win[:, 0])  # anywhere inside the window
    y, yd, ydd = local_motion(t_win, y_win, d, offset)
    at = centre + offset - 3.0
    for i, p in enumerate(poly):
        assert_allclose(y[:, i], p(at), rtol=1e-9, atol=1e-9 * np.abs(p(at)).max())
        assert_allclose(yd[:, i], p.deriv(1)(at), rtol=1e-7, atol=1e-7 * np.abs(p.deriv(1)(at)).max())
        assert_allclose(ydd[:, i], p.deriv(2)(at), rtol=1e-6, atol=1e-6 * np.abs(p.deriv(2)(at)).max())
    # at offset 0 the derivatives are those of local_derivatives
    _, yd0, ydd0 = local_motion(t_win, y_win, d, np.zeros(n_windows))
    ref_d, ref_dd = local_derivatives(t_win, y_win, d)
    assert_allclose(yd0, ref_d, rtol=1e-10, atol=1e-10 * np.abs(ref_d).max())
    assert_allclose(ydd0, ref_dd, rtol=1e-10, atol=1e-10 * np.abs(ref_dd).max())


def test_effort_motion_at_the_declared_delays(rng: np.random.Generator) -> None:
    # three actuators, two distinct delays: two groups; positions a cubic in time, so the window polynomial (d = 3)
    # is exact and the motion at t_k - d is the cubic's there (numpy.polynomial reference)
    n_samples = 400
    t = np.cumsum(DT_S * (1.0 + 0.2 * rng.uniform(-1, 1, n_samples)))
    poly = [np.polynomial.Polynomial(rng.normal(size=4) * [1.0, 1.0, 1.0, 0.5]) for _ in range(3)]
    q = np.stack([p(t) for p in poly], axis=1)
    delays = np.array([3e-4, -7e-4, 3e-4])
    c = Conditioner(3, {"effort": 3}, half_window=5, poly_order=3, max_gap_s=0.01, effort_delay_s=delays)
    out = c.feed(t, q, {"effort": q})
    em = out.effort_motion
    assert_array_equal(em.delay_s, [3e-4, -7e-4])
    assert_array_equal(em.group, [0, 1, 0])
    assert em.q.shape == em.qd.shape == em.qdd.shape == (2, out.n_samples, 3)
    for g, d in enumerate(em.delay_s):
        for i, p in enumerate(poly):
            assert_allclose(em.q[g, :, i], p(out.t - d), rtol=1e-9, atol=1e-9)
            assert_allclose(em.qd[g, :, i], p.deriv(1)(out.t - d), rtol=1e-7, atol=1e-7)
            assert_allclose(em.qdd[g, :, i], p.deriv(2)(out.t - d), rtol=1e-6, atol=1e-6)
    own = em.own_velocity()  # each actuator's velocity at its own effort's instant
    assert_allclose(own[:, 1], poly[1].deriv(1)(out.t + 7e-4), rtol=1e-7, atol=1e-7)
    assert_allclose(own[:, 2], poly[2].deriv(1)(out.t - 3e-4), rtol=1e-7, atol=1e-7)


def test_zero_delay_is_the_centre_sample(rng: np.random.Generator) -> None:
    t, q, effort, temp = stream(rng, 300)
    out = feed(make_conditioner(), t, q, effort, temp)
    em = out.effort_motion
    assert em.n_groups == 1 and em.delay_s[0] == 0.0
    assert_array_equal(em.q[0], out.q)  # the raw centre samples, not the fitted values
    assert_array_equal(em.qd[0], out.qd)
    assert_array_equal(em.qdd[0], out.qdd)
    assert_array_equal(effort_groups(None, 2)[1], [0, 0])


def test_effort_motion_split_invariance(rng: np.random.Generator) -> None:
    t, q, effort, temp = stream(rng, 600)
    t[300:] += 0.05  # a gap
    delays = np.array([4e-4, -2e-4])

    def conditioner() -> Conditioner:
        return Conditioner(
            2, {"effort": 2, "temp": 1}, half_window=5, poly_order=3, max_gap_s=0.01, effort_delay_s=delays
        )

    whole = feed(conditioner(), t, q, effort, temp).effort_motion
    c = conditioner()
    cuts = np.unique(np.concatenate([[0, 1, 2, 7], rng.integers(0, 600, 30), [600]]))
    parts = [
        feed(c, t[a:b], q[a:b], effort[a:b], temp[a:b]).effort_motion for a, b in zip(cuts[:-1], cuts[1:], strict=True)
    ]
    for name in ("q", "qd", "qdd"):
        chunked = np.concatenate([getattr(p, name) for p in parts], axis=1)
        # equal up to rounding: a batch of one window sums its window in another order than a long batch does
        assert_allclose(chunked, getattr(whole, name), rtol=1e-10, atol=1e-10, err_msg=name)


def test_delay_outside_the_window_is_refused(rng: np.random.Generator) -> None:
    t, q, effort, temp = stream(rng, 50)
    c = Conditioner(
        2, {"effort": 2, "temp": 1}, half_window=2, poly_order=2, max_gap_s=0.01, effort_delay_s=np.array([0.0, 3e-3])
    )
    with pytest.raises(ConfigurationError, match=r"effort_delay_s: 0.003 s reaches outside the conditioning window"):
        feed(c, t, q, effort, temp)
    with pytest.raises(ShapeError, match=r"effort_delay_s: expected shape \(2,\)"):
        Conditioner(2, {}, half_window=3, poly_order=2, max_gap_s=0.01, effort_delay_s=np.zeros(3))


def test_regressor_rows_come_from_each_actuators_own_instant(rng: np.random.Generator) -> None:
    # identity: actuator i's rows equal the model's rigid regressor evaluated at its group's motion
    model = build_model(load_description(next(p for p in example_paths() if "delta" in p.name)))
    n_samples = 7
    q0 = model.inverse_kinematics(np.array([[0.0, 0.0, -0.8]]))
    q = q0 + 0.05 * rng.normal(size=(2, n_samples, 3))
    qd, qdd = rng.normal(size=(2, n_samples, 3)), 10.0 * rng.normal(size=(2, n_samples, 3))
    motion = EffortMotion(np.array([1e-4, -5e-4]), np.array([1, 0, 1]), q, qd, qdd)
    tau_known, y_p, own_qd = regressor_at_efforts(model, motion)
    for g, rows in ((0, [1]), (1, [0, 2])):
        tk, yp = model.rigid_regressor(q[g], qd[g], qdd[g])
        assert_array_equal(tau_known[:, rows], tk[:, rows])
        assert_array_equal(y_p[:, rows], yp[:, rows])
        assert_array_equal(own_qd[:, rows], qd[g][:, rows])

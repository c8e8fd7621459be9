"""Savitzky-Golay conditioning: weights, delay, gain, exactness, gaps, streaming and state."""

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
    lag_like_measurement,
    local_derivatives,
    savgol_weights,
)

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


def test_prediction_lag_matches_zero_order_hold_recursion(rng: np.random.Generator) -> None:
    # reference: exact discretisation of a first-order lag with zero-order-held input, y_k = y_{k-1} +
    # (1 - exp(-dt_k / T)) (u_k - y_{k-1}), T = 1 / (2 pi f) (Franklin, Powell and Workman, "Digital Control of
    # Dynamic Systems", 3rd ed., 1998, sec. 6.2, from memory), run sample by sample; restart settled at segment starts
    n_samples, f = 300, np.array([40.0, 80.0, 200.0])
    t = np.cumsum(DT_S * (1.0 + 0.3 * rng.uniform(-1, 1, n_samples)))
    u = rng.normal(size=(n_samples, 3))
    start = np.zeros(n_samples, dtype=bool)
    start[[0, 170]] = True
    y = np.empty_like(u)
    for k in range(n_samples):
        if start[k]:
            y[k] = u[k]
        else:
            y[k] = y[k - 1] + (1.0 - np.exp(-2 * np.pi * f * (t[k] - t[k - 1]))) * (u[k] - y[k - 1])
    whole, y_last, t_last = lag_like_measurement(t, u, start, f, None, np.nan)
    assert_allclose(whole, y, rtol=1e-12, atol=1e-12)
    first, y_mid, t_mid = lag_like_measurement(t[:100], u[:100], start[:100], f, None, np.nan)
    second, y_end, t_end = lag_like_measurement(t[100:], u[100:], start[100:], f, y_mid, t_mid)
    assert_allclose(np.concatenate([first, second]), whole, rtol=1e-12, atol=1e-12)
    assert_array_equal(y_end, y_last)
    assert t_end == t_last == t[-1]

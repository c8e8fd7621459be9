"""CUSUM and GLR: run lengths against Siegmund's approximation, closed form against the recursion, GLR."""

from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy.stats import norm

from shadow.detection.change import (
    CusumDetector,
    cusum_initial_state,
    cusum_statistics,
    cusum_step,
    glr_mean_step,
    glr_statistic,
    siegmund_arl,
    threshold_for_arl,
)
from shadow.errors import ConfigurationError, ShapeError


def siegmund_general(delta: float, b: float) -> float:
    """Siegmund (1985, ch. II) for increments of drift delta and unit variance, b = h + 1.166."""
    return (np.exp(-2 * delta * b) + 2 * delta * b - 1) / (2 * delta**2)


def _first_passage(rng, mu: float, nu: float, h: float, n_chains: int, two_sided: bool, block: int = 2000):
    """Run length of many parallel CUSUM chains (columns) until their first alarm, on N(mu, 1) data."""
    g_pos = np.zeros(n_chains)
    g_neg = np.zeros(n_chains)
    run = np.full(n_chains, -1)
    offset = 0
    while (run < 0).any() and offset < 200 * block:
        z = rng.normal(mu, 1.0, size=(block, n_chains))
        gp, gn = cusum_statistics(z, g_pos, g_neg, nu)
        hit = gp > h
        if two_sided:
            hit |= gn > h
        first = np.where(hit.any(axis=0), hit.argmax(axis=0) + 1, -1)
        new = (run < 0) & (first > 0)
        run[new] = offset + first[new]
        g_pos, g_neg = gp[-1], gn[-1]
        offset += block
    return run


@pytest.mark.parametrize("two_sided", [False, True])
def test_arl0_matches_siegmund(rng, two_sided):
    # Siegmund, "Sequential Analysis" (1985, ch. II), with 1/ARL = 1/ARL+ + 1/ARL- for two sides
    # (Basseville and Nikiforov 1993, sec. 5.2). nu = 0.5, h = 3: ARL0 = 118.7 (one side), 59.3 (two).
    # Tolerance 10 %: the Monte-Carlo standard error with 3000 chains is ~1.8 % (run lengths are roughly
    # geometric, std ~ mean) and the approximation itself is within a few per cent at this h.
    nu, h = 0.5, 3.0
    run = _first_passage(rng, 0.0, nu, h, 3000, two_sided, block=400)
    assert (run > 0).all()
    assert run.mean() == pytest.approx(siegmund_arl(nu, h, two_sided=two_sided), rel=0.10)
    assert siegmund_arl(nu, h, two_sided=False) == pytest.approx(siegmund_general(-nu, h + 1.166), rel=1e-12)


def test_arl1_detection_delay_matches_siegmund(rng):
    # Out-of-control run length for a shift of 1 sigma with nu = 0.5: the same formula with drift
    # delta = mu - nu = 0.5 (Siegmund 1985, ch. II): 8.33 samples. Tolerance 10 %.
    run = _first_passage(rng, 1.0, 0.5, 4.0, 3000, False, block=200)
    assert run.mean() == pytest.approx(siegmund_general(0.5, 4.0 + 1.166), rel=0.10)


def test_wrapper_alarm_spacing_is_arl0(rng):
    # With restarts after each alarm the alarms form a renewal process: the mean spacing is ARL0.
    nu, h = 0.5, 3.0
    det = CusumDetector(np.full(6, 2.0), np.full(6, 0.5), nu, h)
    n = 40_000
    t = np.arange(n) * 1e-3
    _, _, alarms = det.update(t, rng.normal(2.0, 0.5, size=(n, 6)))
    per_channel = [sorted(a.alarm_index for a in alarms if a.channel == c) for c in range(6)]
    gaps = np.concatenate([np.diff(np.r_[-1, idx]) for idx in per_channel])
    # Siegmund two-sided ARL0 at h = 3 is 80.9 samples; ~3000 gaps give a standard error of ~1.5 %.
    assert gaps.mean() == pytest.approx(siegmund_arl(nu, h), rel=0.10)


@pytest.mark.parametrize("n_samples", [1, 3, 6, 500])
def test_closed_form_matches_recursion(rng, n_samples):
    # Lindley's closed form (1) against Page's recursion g_k = max(0, g_{k-1} + z_k - nu).
    z = rng.normal(0.3, 1.0, size=(n_samples, 3))
    g0p, g0n = np.array([0.0, 1.5, 3.0]), np.array([2.0, 0.0, 0.1])
    gp, gn = cusum_statistics(z, g0p, g0n, 0.4)
    assert gp.shape == gn.shape == (n_samples, 3)
    rp, rn = np.empty_like(z), np.empty_like(z)
    p, m = g0p.copy(), g0n.copy()
    for k in range(n_samples):
        p = np.maximum(0.0, p + z[k] - 0.4)
        m = np.maximum(0.0, m - z[k] - 0.4)
        rp[k], rn[k] = p, m
    assert_allclose(gp, rp, rtol=1e-12, atol=1e-12)
    assert_allclose(gn, rn, rtol=1e-12, atol=1e-12)


def _loop_cusum(z, nu, h):
    """Plain two-sided CUSUM with restarts and Page's onset, sample by sample."""
    out = []
    for c in range(z.shape[1]):
        p = m = 0.0
        zp = zn = -1  # last sample where each statistic was zero
        for k in range(z.shape[0]):
            p = max(0.0, p + z[k, c] - nu)
            m = max(0.0, m - z[k, c] - nu)
            if p > h or m > h:
                rise = p >= m
                out.append((c, 1 if rise else -1, k, (zp if rise else zn) + 1))
                p = m = 0.0
                zp = zn = k
                continue
            zp = k if p == 0.0 else zp
            zn = k if m == 0.0 else zn
    return out


def test_alarms_match_loop_and_chunking(rng):
    n = 5000
    z = rng.normal(size=(n, 3))
    z[2000:2600, 1] += 1.2
    z[3000:3300, 2] -= 1.5
    t = np.arange(n) * 0.01
    ref = _loop_cusum(z, 0.5, 5.0)
    _, _, alarms, _ = cusum_step(cusum_initial_state(3), t, z, 0.5, 5.0, lookahead_samples=64)
    got = [(a.channel, a.direction, a.alarm_index, a.onset_index) for a in alarms]
    assert got == ref
    det = CusumDetector(np.zeros(3), np.ones(3), 0.5, 5.0)
    chunked = []
    for s in range(0, n, 333):
        saved = det.save()
        det = CusumDetector(np.zeros(3), np.ones(3), 0.5, 5.0)
        det.restore(saved)
        chunked += det.update(t[s : s + 333], z[s : s + 333])[2]
    got_chunked = sorted((a.channel, a.direction, a.alarm_index, a.onset_index) for a in chunked)
    assert got_chunked == sorted(ref)
    assert all(a.onset_time_s == pytest.approx(t[a.onset_index]) for a in chunked)


def test_step_is_found_with_onset(rng):
    n = 3000
    y = rng.normal(0.0, 1.0, size=(n, 1))
    y[1800:] += 1.5
    det = CusumDetector(np.zeros(1), np.ones(1), 0.75, threshold_for_arl(1e5, 0.75))
    _, _, alarms = det.update(np.arange(n) * 1e-3, y)
    late = [a for a in alarms if a.alarm_index >= 1800]
    assert late and late[0].direction == 1
    assert abs(late[0].onset_index - 1800) < 15
    assert late[0].delay_s > 0


def test_threshold_inverts_siegmund():
    for arl in (500.0, 1e4, 1e6):
        h = threshold_for_arl(arl, 0.5)
        assert siegmund_arl(0.5, h) == pytest.approx(arl, rel=1e-9)
    with pytest.raises(ConfigurationError, match="arl0_samples"):
        threshold_for_arl(1.0, 0.5)


def test_glr_matches_brute_force_likelihood(rng):
    # 2 ln Lambda(k) computed from Gaussian log-densities (scipy.stats.norm.logpdf) at the MLE means,
    # known sigma (Basseville and Nikiforov 1993, sec. 2.4.3).
    x = rng.normal(0.0, 0.7, 60)
    x[37:] += 0.9
    stat = glr_statistic(x, 0.7)
    ref = np.full(60, -np.inf)
    one = norm.logpdf(x, x.mean(), 0.7).sum()
    for k in range(2, 59):
        two = norm.logpdf(x[:k], x[:k].mean(), 0.7).sum() + norm.logpdf(x[k:], x[k:].mean(), 0.7).sum()
        ref[k] = 2 * (two - one)
    assert_allclose(stat, ref, rtol=1e-9, atol=1e-9)
    # unknown sigma: profile likelihood with sigma at its MLE in each hypothesis
    stat_u = glr_statistic(x)
    k = 20
    s0 = x.std()
    s1 = np.sqrt((((x[:k] - x[:k].mean()) ** 2).sum() + ((x[k:] - x[k:].mean()) ** 2).sum()) / 60)
    two = norm.logpdf(x[:k], x[:k].mean(), s1).sum() + norm.logpdf(x[k:], x[k:].mean(), s1).sum()
    assert stat_u[k] == pytest.approx(2 * (two - norm.logpdf(x, x.mean(), s0).sum()), rel=1e-9)


def test_glr_change_time_and_interval_coverage(rng):
    # The 95 % intervals should cover the true means in about 95 % of windows (binomial: 400 windows,
    # standard error 1.1 %; accept 91-99 %, the change-time estimate adds a little error near the step).
    cover = []
    found = []
    for _ in range(400):
        x = rng.normal(1.0, 0.5, 300)
        x[180:] += 1.0
        res = glr_mean_step(x)
        found.append(res.change_index)
        cover.append(res.interval_before[0] <= 1.0 <= res.interval_before[1])
        cover.append(res.interval_after[0] <= 2.0 <= res.interval_after[1])
    assert np.median(np.abs(np.array(found) - 180)) <= 1
    assert 0.91 <= np.mean(cover) <= 0.99
    assert res.step == pytest.approx(1.0, abs=0.3)


def test_rejects_bad_inputs():
    with pytest.raises(ShapeError, match="z: expected shape"):
        cusum_step(cusum_initial_state(2), np.zeros(4), np.zeros((4, 3)), 0.5, 4.0)
    with pytest.raises(ConfigurationError, match="std"):
        CusumDetector(np.zeros(2), np.array([1.0, 0.0]), 0.5, 4.0)
    with pytest.raises(ShapeError, match="need at least 4 samples"):
        glr_statistic(np.zeros(3))

"""Structural mode: recover a known damped resonance from noise, tracking, quality flag."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import signal

from shadow.detection.modes import (
    ModeQuality,
    ModeTracker,
    estimate_mode,
    mode_from_residual,
    residual_psd,
    sdof_psd,
    track_mode,
)
from shadow.errors import ShapeError, TimeOrderError

FS = 1000.0


def resonant_noise(rng, f_n, zeta, n, n_act=3, floor=0.02):
    """White noise through a 2nd-order system w^2 / (s^2 + 2 zeta w s + w^2) (scipy.signal), plus a floor.

    The zero-order-hold discretisation (scipy.signal.cont2discrete) maps the poles by z = exp(s T), so the
    discrete system has exactly the same f_n and zeta.
    """
    w = 2 * np.pi * f_n
    b, a, _ = signal.cont2discrete(([w**2], [1.0, 2 * zeta * w, w**2]), 1 / FS, method="zoh")
    x = signal.lfilter(b.ravel(), a, rng.normal(size=(n, n_act)), axis=0)
    return x + floor * rng.normal(size=(n, n_act)) * x.std()


@pytest.mark.parametrize(("f_n", "zeta"), [(32.0, 0.03), (55.0, 0.015), (12.0, 0.05)])
def test_recovers_known_resonance(rng, f_n, zeta):
    # Against scipy.signal: the discrete poles' own frequency and damping (np.roots of the denominator).
    r = resonant_noise(rng, f_n, zeta, 120_000)
    est = mode_from_residual(r, FS, nperseg=8192)
    w = 2 * np.pi * f_n
    _, a, _ = signal.cont2discrete(([w**2], [1.0, 2 * zeta * w, w**2]), 1 / FS, method="zoh")
    s_pole = np.log(np.roots(a)[0]) * FS  # back to the s-plane
    f_ref, zeta_ref = abs(s_pole) / (2 * np.pi), -s_pole.real / abs(s_pole)
    assert est.quality is ModeQuality.GOOD
    assert est.frequency_hz == pytest.approx(f_ref, rel=0.02)
    # damping within 20 %: few bins across the half-power band, Hann leakage and Welch scatter (module doc)
    assert est.damping_ratio == pytest.approx(zeta_ref, rel=0.20)
    assert est.half_power_damping == pytest.approx(zeta_ref, rel=0.5)


def test_model_peak_matches_textbook():
    # SDOF receptance peak: f_peak = f_n sqrt(1 - 2 zeta^2), |H|^2 max = A / (4 zeta^2 (1 - zeta^2))
    # (Ewins, Modal Testing, 2000, sec. 2.2).
    f = np.linspace(20, 40, 200_001)
    S = sdof_psd(f, 1.0, 30.0, 0.05, 0.0)
    assert f[np.argmax(S)] == pytest.approx(30.0 * np.sqrt(1 - 2 * 0.05**2), abs=1e-4)
    assert S.max() == pytest.approx(1 / (4 * 0.05**2 * (1 - 0.05**2)), rel=1e-8)


def test_white_noise_has_no_mode(rng):
    est = mode_from_residual(rng.normal(size=(60_000, 3)), FS, nperseg=4096)
    assert est.quality is ModeQuality.NONE
    assert np.isnan(est.frequency_hz)


def test_unresolved_bandwidth_is_weak(rng):
    # zeta = 0.002 at 30 Hz: half-power band 0.12 Hz, under one bin of 0.49 Hz (nperseg 2048)
    r = resonant_noise(rng, 30.0, 0.002, 60_000)
    f, S = residual_psd(r, FS, nperseg=2048)
    est = estimate_mode(f, S)
    assert est.quality is ModeQuality.WEAK
    assert est.frequency_hz == pytest.approx(30.0, rel=0.02)


def test_tracker_follows_a_frequency_drop(rng):
    a = resonant_noise(rng, 40.0, 0.03, 60_000)
    b = resonant_noise(rng, 34.0, 0.03, 60_000)
    r = np.concatenate((a, b))
    t = np.arange(r.shape[0]) / FS
    track = track_mode(t, r, window_s=30.0, step_s=30.0, nperseg=4096)
    assert track.t_s.shape == (4,)
    np.testing.assert_allclose(track.frequency_hz, [40, 40, 34, 34], rtol=0.02)
    # streaming in uneven batches gives the same series
    tracker = ModeTracker(window_s=30.0, step_s=30.0, nperseg=4096)
    got = []
    for s, e in [(0, 12_345), (12_345, 70_001), (70_001, 70_002), (70_002, 120_000)]:
        got.append(tracker.update(t[s:e], r[s:e]).frequency_hz)
    # same windows; the fits agree to the least-squares tolerance (buffer offsets change rounding)
    np.testing.assert_allclose(np.concatenate(got), track.frequency_hz, rtol=1e-6)
    with pytest.raises(TimeOrderError, match="batch starts"):
        tracker.update(t[:10], r[:10])


def test_rejects_short_input():
    with pytest.raises(ShapeError, match="at least 16 samples"):
        residual_psd(np.zeros((8, 3)), FS)

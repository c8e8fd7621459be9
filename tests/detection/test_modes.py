"""Structural mode: recover a known damped resonance from noise, tracking, quality flag, the live Welch sum."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import signal

from shadow.detection.modes import (
    ModeQuality,
    ModeTracker,
    WelchAccumulator,
    WelchSettings,
    estimate_mode,
    mode_from_residual,
    residual_psd,
    sdof_psd,
    track_mode,
)
from shadow.errors import ConfigurationError, NonFiniteError, ShapeError, TimeOrderError

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


def discrete_pole(f_n: float, zeta: float) -> tuple[float, float]:
    """f_n [Hz] and zeta of the zero-order-hold pole of resonant_noise's filter (np.roots, back to the s-plane)."""
    w = 2 * np.pi * f_n
    _, a, _ = signal.cont2discrete(([w**2], [1.0, 2 * zeta * w, w**2]), 1 / FS, method="zoh")
    s_pole = np.log(np.roots(a)[0]) * FS
    return abs(s_pole) / (2 * np.pi), -s_pole.real / abs(s_pole)


def feed(acc: WelchAccumulator, t: np.ndarray, r: np.ndarray, cuts: list[int]) -> list:
    """Feed t, r in the batches between the cut indices; the estimates completed, in order."""
    out = []
    for a, b in zip([0, *cuts], [*cuts, t.shape[0]], strict=True):
        out += acc.update(t[a:b], r[a:b])
    return out


@pytest.mark.parametrize("nperseg", [1000, 999])  # even and odd: the Nyquist bin is single only for even L
@pytest.mark.parametrize("cuts", [[], [1, 4, 10], [333, 1500, 1501, 4000], list(range(500, 12_000, 500))])
def test_live_welch_sum_is_scipys_welch(rng, nperseg, cuts):
    # Reference: scipy.signal.welch with its defaults (Hann, 50 % overlap, constant detrend, density, one-sided)
    # on each estimate's stretch of a uniformly sampled signal, summed over columns.
    K = 7
    hop = nperseg - nperseg // 2
    span = (K - 1) * hop + nperseg  # samples under one estimate's K segments
    r = rng.normal(size=(2 * K * hop + nperseg + 123, 3)) * [1.0, 2.0, 0.5]
    t = 10.0 + np.arange(r.shape[0]) / FS
    acc = WelchAccumulator(3, WelchSettings(nperseg=nperseg, segments_per_estimate=K, dt_s=1 / FS))
    got = feed(acc, t, r, cuts)
    assert len(got) == 2
    for j, e in enumerate(got):
        a = j * K * hop  # the next estimate's first segment follows the last one's by a hop
        f, S = signal.welch(r[a : a + span], fs=FS, nperseg=nperseg, axis=0)
        np.testing.assert_allclose(e.f, f, rtol=1e-12)
        assert np.max(np.abs(e.S - S.sum(axis=1))) <= 1e-10 * np.max(S.sum(axis=1))
        assert (e.start_s, e.end_s, e.segments) == (t[a], t[a + span - 1], K)
    assert acc.segments == (r.shape[0] - 2 * K * hop - nperseg) // hop + 1


def test_a_gap_drops_the_open_segment_but_not_the_sum(rng):
    # two uniformly sampled runs with a 5 ms gap: the estimate is the mean of both runs' Welch segments
    L, hop = 1000, 500
    r = rng.normal(size=(7000, 2))
    t = np.arange(7000) / FS
    t[3200:] += 0.005  # the gap
    first, second = r[:3200], r[3200:]
    k1, k2 = (3200 - L) // hop + 1, (3800 - L) // hop + 1  # 5 and 6 whole segments, the rest of each is dropped
    acc = WelchAccumulator(2, WelchSettings(nperseg=L, segments_per_estimate=k1 + k2, dt_s=1 / FS))
    (e,) = feed(acc, t, r, [3100, 3300])
    _, S1 = signal.welch(first[: (k1 - 1) * hop + L], fs=FS, nperseg=L, axis=0)  # scipy.signal.welch per run
    _, S2 = signal.welch(second[: (k2 - 1) * hop + L], fs=FS, nperseg=L, axis=0)
    want = (k1 * S1.sum(axis=1) + k2 * S2.sum(axis=1)) / (k1 + k2)
    assert np.max(np.abs(e.S - want)) <= 1e-10 * want.max()
    assert e.segments == 11 and e.start_s == t[0] and e.end_s == t[3200 + (k2 - 1) * hop + L - 1]


def test_irregular_steps_end_segments_and_time_must_run_forward(rng):
    L = 100
    acc = WelchAccumulator(1, WelchSettings(nperseg=L, segments_per_estimate=1, dt_s=1 / FS))
    t = np.arange(150) / FS
    t[120:] += 0.6e-3  # one step of 1.6 dt inside the second segment's span
    got = acc.update(t, rng.normal(size=(150, 1)))
    assert [e.end_s for e in got] == [t[99]]  # [50, 150) would cross the step: not a segment
    assert acc.save("x/")["x/part_t"].tolist() == t[120:].tolist()  # the open segment restarts after the step
    with pytest.raises(TimeOrderError, match="batch starts"):
        acc.update(t[-5:], np.zeros((5, 1)))
    with pytest.raises(TimeOrderError, match="strictly increasing"):
        acc.update(np.array([1.0, 1.0]), np.zeros((2, 1)))
    with pytest.raises(ShapeError, match=r"r: expected shape \(2, 1\)"):
        acc.update(np.array([2.0, 2.001]), np.zeros((2, 3)))
    with pytest.raises(NonFiniteError, match="r: non-finite"):
        acc.update(np.array([2.0, 2.001]), np.array([[0.0], [np.nan]]))
    for bad, match in [
        ({"nperseg": 8}, "nperseg"),
        ({"segments_per_estimate": 0}, "segments_per_estimate"),
        ({"dt_s": 0.0}, "dt_s"),
        ({"band_hz": (80.0, 5.0)}, "band_hz"),
    ]:
        kwargs = {"nperseg": 100, "segments_per_estimate": 2, "dt_s": 1e-3, **bad}
        with pytest.raises(ConfigurationError, match=match):
            WelchSettings(**kwargs)


def test_saved_state_is_small_and_resumes_exactly(rng):
    r = resonant_noise(rng, 30.0, 0.04, 40_000)
    t = 1.8e9 + np.arange(r.shape[0]) / FS
    settings = WelchSettings(nperseg=2000, segments_per_estimate=9, dt_s=1 / FS)
    whole = feed(WelchAccumulator(3, settings), t, r, list(range(1000, 40_000, 1000)))
    a = WelchAccumulator(3, settings)
    head = feed(a, t[:13_517], r[:13_517], list(range(1000, 13_517, 1000)))
    state = {k: v.copy() for k, v in a.save("m/").items()}
    assert state["m/part_t"].shape[0] < settings.nperseg  # the open segment, never the whole window
    assert sum(v.size for v in state.values()) < 4 * settings.nperseg + settings.nperseg // 2 + 10
    b = WelchAccumulator(3, settings)
    b.restore(state, "m/")
    tail = feed(b, t[13_517:], r[13_517:], list(range(1000, 40_000 - 13_517, 1000)))
    assert len(head + tail) == len(whole) == 4
    for x, y in zip(head + tail, whole, strict=True):
        np.testing.assert_array_equal(x.S, y.S)
        assert x.mode == y.mode and x.start_s == y.start_s and x.end_s == y.end_s


def test_live_welch_recovers_a_known_resonance(rng):
    # Against scipy.signal: the zero-order-hold pole of the filter that shaped the noise (1 % on frequency)
    f_ref, zeta_ref = discrete_pole(32.0, 0.03)
    r = resonant_noise(rng, 32.0, 0.03, 60_000)
    t = np.arange(r.shape[0]) / FS
    settings = WelchSettings.for_window(segment_s=4.0, window_s=60.0, dt_s=1 / FS)
    assert (settings.nperseg, settings.segments_per_estimate) == (4000, 29)  # floor((60000 - 4000) / 2000) + 1
    (e,) = feed(WelchAccumulator(3, settings), t, r, list(range(1000, 60_000, 1000)))
    assert e.mode.quality is ModeQuality.GOOD
    assert e.mode.frequency_hz == pytest.approx(f_ref, rel=0.01)
    assert e.mode.damping_ratio == pytest.approx(zeta_ref, rel=0.20)  # see the module doc on damping
    offline = estimate_mode(*residual_psd(r[: (29 - 1) * 2000 + 4000], FS, nperseg=4000))
    # the same fit as offline; the PSDs differ by rounding only, which the least-squares fit passes on (~1e-8)
    assert e.mode.frequency_hz == pytest.approx(offline.frequency_hz, rel=1e-6)
    assert e.mode.damping_ratio == pytest.approx(offline.damping_ratio, rel=1e-6)


@pytest.mark.parametrize(("f_n", "zeta"), [(40.0, 0.05), (26.0, 0.07)])
def test_fit_std_is_the_size_of_the_scatter_over_repeated_records(f_n, zeta):
    # 30 independent records: the reported std of f_n and zeta against their sample scatter (within 1.6x;
    # the Hann bins' correlation is taken as an equivalent noise bandwidth of 1.5 bins, Harris 1978)
    est = [
        mode_from_residual(resonant_noise(np.random.default_rng(seed), f_n, zeta, 20_000), FS, nperseg=2000)
        for seed in range(30)
    ]
    f = np.array([e.frequency_hz for e in est])
    z = np.array([e.damping_ratio for e in est])
    ratio_f = np.std(f, ddof=1) / np.mean([e.frequency_std_hz for e in est])
    ratio_z = np.std(z, ddof=1) / np.mean([e.damping_std for e in est])
    assert 1 / 1.6 < ratio_f < 1.6 and 1 / 1.6 < ratio_z < 1.6

"""The lightly damped structural mode seen in the effort residual: frequency and damping, tracked over time.

A compliant mode (belt, forearm, screw support) filters broadband excitation; near its resonance the
power spectral density of the residual follows that of a single-degree-of-freedom oscillator driven by
white noise, on top of a flat noise floor (Ewins, "Modal Testing", 2nd ed., 2000, sec. 2.2, receptance of
a viscously damped SDOF system):

    |H(f)|^2 = A / ((1 - (f/f_n)^2)^2 + (2 zeta f/f_n)^2)                                   (1)
    S(f) = |H(f)|^2 + c                                                                      (2)

Steps: Welch PSD (scipy.signal.welch, Hann window) summed over actuators; the largest peak in the band;
a start from the half-power bandwidth, zeta_0 = (f_2 - f_1) / (2 f_peak) (Ewins sec. 4.3); then a
least-squares fit of (2) in log PSD (scipy.optimize.least_squares) over the peak's neighbourhood.

Symbols
-------
r      : (N, n) effort residual [N m | N], uniformly sampled at fs_hz
f, S   : (F,) frequencies [Hz] and (F,) PSD [unit^2/Hz]
f_n    : natural frequency [Hz];  zeta : damping ratio [-]

Damping is harder than frequency: the half-power bandwidth 2 zeta f_n spans few PSD bins, the Hann
window widens the peak by about one bin, and the Welch estimate scatters each bin by about
1 / sqrt(segments); the frequency comes from the peak's centre, which all bins of the peak support.
The quality flag says when the bandwidth is resolved by fewer than ``min_bins_per_bandwidth`` bins.
"""

from __future__ import annotations

import enum
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray
from scipy.optimize import least_squares
from scipy.signal import welch

from shadow.errors import ConfigurationError, ShapeError, TimeOrderError, expect_finite, expect_shape

Array = NDArray[np.float64]


class ModeQuality(enum.Enum):
    """How far to trust a mode estimate."""

    GOOD = "good"  # clear peak, resolved bandwidth, fit inside its bounds
    WEAK = "weak"  # a peak, but the bandwidth is barely resolved or the fit hit a bound
    NONE = "none"  # no peak above the floor in the band: frequency and damping are NaN


@dataclass(frozen=True, slots=True)
class ModeEstimate:
    """One mode estimate.

    frequency_hz, damping_ratio : fitted f_n [Hz] and zeta [-] (NaN when quality is NONE)
    half_power_damping : zeta_0 from the half-power bandwidth (the fit's start) [-]
    prominence : peak PSD over the noise floor [-]
    quality : :class:`ModeQuality`
    """

    frequency_hz: float
    damping_ratio: float
    half_power_damping: float
    prominence: float
    quality: ModeQuality


def sdof_psd(f: Array, A: float, f_n: float, zeta: float, c: float) -> Array:
    """Model PSD (2): SDOF resonance (1) plus a flat floor c."""
    x = f / f_n  # frequency ratio
    return A / ((1.0 - x**2) ** 2 + (2.0 * zeta * x) ** 2) + c


def residual_psd(r: Array, fs_hz: float, *, nperseg: int = 8192) -> tuple[Array, Array]:
    """Welch PSD of the residual, summed over actuators: (f (F,), S (F,))."""
    expect_shape("r", r, (None, None))
    expect_finite("r", r)
    if fs_hz <= 0.0:
        raise ConfigurationError(f"fs_hz: must be positive, got {fs_hz!r}")
    seg = min(nperseg, r.shape[0])
    if seg < 16:
        raise ShapeError(f"r: need at least 16 samples for a spectrum, got {r.shape[0]}")
    f, S = welch(r, fs=fs_hz, nperseg=seg, axis=0, detrend="constant")  # one-sided PSD per column
    return f, S.sum(axis=1)


def _half_power(f: Array, S: Array, i: int, floor: float) -> tuple[float, float]:
    """(f_1, f_2) where S - floor falls to half its peak value either side of bin i (linear interpolation)."""
    half = floor + 0.5 * (S[i] - floor)
    lo = i
    while lo > 0 and S[lo] > half:  # walk out over a handful of bins (the peak), not over samples
        lo -= 1
    hi = i
    while hi < S.size - 1 and S[hi] > half:
        hi += 1
    f1 = np.interp(half, [S[lo], S[lo + 1]], [f[lo], f[lo + 1]]) if lo < i else f[i]
    f2 = np.interp(half, [S[hi], S[hi - 1]], [f[hi], f[hi - 1]]) if hi > i else f[i]
    return float(f1), float(f2)


def estimate_mode(
    f: Array,
    S: Array,
    *,
    band_hz: tuple[float, float] = (5.0, 80.0),
    min_prominence: float = 4.0,
    fit_bandwidths: float = 4.0,
    min_bins_per_bandwidth: float = 3.0,
    damping_bounds: tuple[float, float] = (1e-4, 0.5),
    max_fit_evaluations: int = 2000,
) -> ModeEstimate:
    """Fit (2) to the largest peak of S in band_hz.

    Parameters
    ----------
    f, S : (F,) frequencies [Hz] and PSD
    band_hz : search band [Hz]
    min_prominence : smallest peak / floor ratio that counts as a mode
    fit_bandwidths : half-width of the fitted neighbourhood, in half-power bandwidths (at least 5 bins)
    min_bins_per_bandwidth : fewer PSD bins across 2 zeta f_n make the estimate WEAK
    damping_bounds : bounds of zeta in the fit
    max_fit_evaluations : cap of the least-squares function evaluations
    """
    expect_shape("S", S, f.shape)
    in_band = np.flatnonzero((f >= band_hz[0]) & (f <= band_hz[1]))
    none = ModeEstimate(np.nan, np.nan, np.nan, 0.0, ModeQuality.NONE)
    if in_band.size < 5:
        return none
    floor = float(np.median(S[in_band]))  # noise floor: most of the band is off-resonance
    i = int(in_band[np.argmax(S[in_band])])
    prominence = float(S[i] / floor) if floor > 0.0 else np.inf
    if not prominence >= min_prominence:
        return none
    f1, f2 = _half_power(f, S, i, floor)
    df = float(f[1] - f[0])
    bandwidth = max(f2 - f1, df)
    zeta0 = float(np.clip(bandwidth / (2.0 * f[i]), *damping_bounds))  # zeta_0 = (f2 - f1) / (2 f_peak)
    half_width = max(fit_bandwidths * bandwidth, 5.0 * df)
    win = (f >= f[i] - half_width) & (f <= f[i] + half_width) & (f > 0.0)
    fw, Sw = f[win], S[win]
    A0 = max(S[i] - floor, floor) * (2.0 * zeta0) ** 2  # peak of (1) is about A / (2 zeta)^2
    x0 = np.array([np.log(A0), f[i], np.log(zeta0), np.log(floor)])
    lo = np.array([-np.inf, max(band_hz[0], fw[0]), np.log(damping_bounds[0]), -np.inf])
    hi = np.array([np.inf, min(band_hz[1], fw[-1]), np.log(damping_bounds[1]), np.inf])
    x0 = np.clip(x0, lo + 1e-12, hi - 1e-12)

    def resid(x: Array) -> Array:
        model = sdof_psd(fw, np.exp(x[0]), x[1], np.exp(x[2]), np.exp(x[3]))
        out: Array = np.log(model) - np.log(Sw)  # fit in log PSD: every bin weighs alike
        return out

    sol = least_squares(resid, x0, bounds=(lo, hi), max_nfev=max_fit_evaluations, x_scale="jac")
    f_n, zeta = float(sol.x[1]), float(np.exp(sol.x[2]))
    at_bound = bool(np.any(np.isclose(sol.x[1:3], lo[1:3], rtol=1e-6) | np.isclose(sol.x[1:3], hi[1:3], rtol=1e-6)))
    resolved = 2.0 * zeta * f_n / df >= min_bins_per_bandwidth
    if not sol.success:
        return ModeEstimate(np.nan, np.nan, zeta0, prominence, ModeQuality.NONE)
    quality = ModeQuality.GOOD if (resolved and not at_bound) else ModeQuality.WEAK
    return ModeEstimate(f_n, zeta, zeta0, prominence, quality)


def mode_from_residual(
    r: Array, fs_hz: float, *, nperseg: int = 8192, band_hz: tuple[float, float] = (5.0, 80.0)
) -> ModeEstimate:
    """Welch PSD of r (N, n) then :func:`estimate_mode`."""
    f, S = residual_psd(r, fs_hz, nperseg=nperseg)
    return estimate_mode(f, S, band_hz=band_hz)


@dataclass(frozen=True, slots=True)
class ModeTrack:
    """A series of mode estimates: t_s (W,) window centres [s], frequency_hz (W,), damping_ratio (W,), quality."""

    t_s: Array
    frequency_hz: Array
    damping_ratio: Array
    quality: tuple[ModeQuality, ...]


def track_mode(
    t: Array,
    r: Array,
    *,
    window_s: float,
    step_s: float,
    nperseg: int = 8192,
    band_hz: tuple[float, float] = (5.0, 80.0),
    start_s: float | None = None,
) -> ModeTrack:
    """Mode estimates over windows [t0 + j step_s, t0 + j step_s + window_s) that fit inside t.

    A loop over windows (each a Welch PSD and a small fit); r must be uniformly sampled.
    """
    expect_shape("t", t, (None,))
    expect_shape("r", r, (t.shape[0], None))
    if window_s <= 0.0 or step_s <= 0.0:
        raise ConfigurationError("window_s and step_s must be positive")
    if t.shape[0] < 2:
        return ModeTrack(np.zeros(0), np.zeros(0), np.zeros(0), ())
    dt = np.diff(t)
    if np.any(dt <= 0.0):
        raise TimeOrderError("t: sample times must be strictly increasing")
    fs_hz = 1.0 / float(np.median(dt))
    t0 = float(t[0]) if start_s is None else start_s
    n_windows = int(np.floor((t[-1] + 1.0 / fs_hz - t0 - window_s) / step_s + 1e-9)) + 1  # last sample inside
    starts = t0 + step_s * np.arange(max(n_windows, 0))
    centres, freqs, zetas, quality = [], [], [], []
    for s in starts:  # loop over windows
        a, b = np.searchsorted(t, [s, s + window_s])
        est = mode_from_residual(r[a:b], fs_hz, nperseg=nperseg, band_hz=band_hz)
        centres.append(s + 0.5 * window_s)
        freqs.append(est.frequency_hz)
        zetas.append(est.damping_ratio)
        quality.append(est.quality)
    return ModeTrack(np.array(centres), np.array(freqs), np.array(zetas), tuple(quality))


class ModeTracker:
    """Buffers residual samples across batches and emits one estimate every step_s over the last window_s."""

    def __init__(
        self, *, window_s: float, step_s: float, nperseg: int = 8192, band_hz: tuple[float, float] = (5.0, 80.0)
    ) -> None:
        if window_s <= 0.0 or step_s <= 0.0:
            raise ConfigurationError("window_s and step_s must be positive")
        self.window_s, self.step_s, self.nperseg, self.band_hz = window_s, step_s, nperseg, band_hz
        self._t = np.zeros(0)
        self._r: Array | None = None
        self._next_start_s: float | None = None
        self._last_t_s: float | None = None

    def update(self, t: Array, r: Array) -> ModeTrack:
        """Append a batch (t (N,), r (N, n)); return the estimates of every window completed by it."""
        expect_shape("r", r, (t.shape[0], None))
        if t.shape[0] == 0:
            return ModeTrack(np.zeros(0), np.zeros(0), np.zeros(0), ())
        if self._last_t_s is not None and t[0] <= self._last_t_s:
            raise TimeOrderError(f"t: batch starts at {t[0]!r} s, not after {self._last_t_s!r} s")
        self._last_t_s = float(t[-1])
        self._t = np.concatenate((self._t, t))
        self._r = r.copy() if self._r is None else np.concatenate((self._r, r))
        if self._next_start_s is None:
            self._next_start_s = float(t[0])
        track = track_mode(
            self._t, self._r, window_s=self.window_s, step_s=self.step_s, nperseg=self.nperseg,
            band_hz=self.band_hz, start_s=self._next_start_s,
        )  # fmt: skip
        self._next_start_s += self.step_s * track.t_s.size
        keep = self._t >= self._next_start_s  # samples still needed by a future window
        self._t, self._r = self._t[keep], self._r[keep]
        return track

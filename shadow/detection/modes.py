"""The lightly damped structural mode seen in the effort residual: frequency and damping, tracked over time.

A compliant mode (belt, forearm, screw support) filters broadband excitation; near its resonance the
power spectral density of the residual follows that of a single-degree-of-freedom oscillator driven by
white noise, on top of a flat noise floor (Ewins, "Modal Testing", 2nd ed., 2000, sec. 2.2, receptance of
a viscously damped SDOF system):

    |H(f)|^2 = A / ((1 - (f/f_n)^2)^2 + (2 zeta f/f_n)^2)                                   (1)
    S(f) = |H(f)|^2 + c                                                                      (2)

Steps: Welch PSD (scipy.signal.welch, Hann window) summed over actuators; the largest peak in the band;
a start from the half-power bandwidth, zeta_0 = (f_2 - f_1) / (2 f_peak) (Ewins sec. 4.3); then a
least-squares fit of (2) in log PSD (scipy.optimize.least_squares) over the peak's neighbourhood. The
standard deviations of f_n and zeta come from the fit's Jacobian at the solution,
``cov = B s^2 (J^T J)^-1`` with ``s^2`` the residual variance (nonlinear least squares, Seber and Wild,
"Nonlinear Regression", 1989, sec. 2.1; from memory); neighbouring bins of a windowed spectrum are
correlated, so the fitted bins count as ``m / B`` independent ones, B the window's equivalent noise bandwidth
in bins (1.5 for Hann: Harris, "On the use of windows for harmonic analysis with the discrete Fourier
transform", Proc. IEEE 66(1), 1978, table 1).

Live, :class:`WelchAccumulator` computes the same Welch PSD incrementally (Welch, "The use of fast Fourier
transform for the estimation of power spectra", IEEE Trans. Audio Electroacoust. 15(2), 1967): each
uniformly sampled segment of ``L`` samples, with a hop of ``L - L // 2`` (50 % overlap), gives the one-sided
periodogram

    P(f_j) = g_j |sum_k w_k (x_k - mean x) e^{-2 pi i j k / L}|^2 / (fs sum_k w_k^2)                 (3)

(``w`` the periodic Hann window, ``g_j = 2`` except at 0 Hz and, for even L, at Nyquist, where it is 1;
the density scaling of scipy.signal.welch), summed over actuators and added to a running sum; after a set
number of segments the sum's mean is the Welch PSD of that stretch, and the sum restarts. Only the open
segment (fewer than L samples) and the sum are carried, so the saved state stays small.

Symbols
-------
r      : (N, n) effort residual [N m | N], uniformly sampled at fs_hz
t      : (N,) sample times [s]
f, S   : (F,) frequencies [Hz] and (F,) PSD [unit^2/Hz]
L      : samples per Welch segment (``nperseg``); F = L // 2 + 1
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
from scipy.signal import get_window, welch

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
    frequency_std_hz, damping_std : standard deviations of f_n [Hz] and zeta [-] from the fit (NaN without one)
    """

    frequency_hz: float
    damping_ratio: float
    half_power_damping: float
    prominence: float
    quality: ModeQuality
    frequency_std_hz: float = np.nan
    damping_std: float = np.nan


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
    window_enbw_bins: float = 1.5,
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
    window_enbw_bins : B, equivalent noise bandwidth of the spectrum's window in bins (Hann: 1.5), for the stds
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
    f_std, zeta_std = _fit_std(sol.jac, sol.fun, zeta, window_enbw_bins)
    return ModeEstimate(f_n, zeta, zeta0, prominence, quality, f_std, zeta_std)


def _fit_std(jac: Array, fun: Array, zeta: float, enbw_bins: float) -> tuple[float, float]:
    """(std f_n [Hz], std zeta) from ``cov = B s^2 (J^T J)^-1``, ``s^2 = sum r^2 / (m - 4)``; zeta = exp(x_2)."""
    m, p = jac.shape
    if m <= p:
        return np.nan, np.nan
    s2 = enbw_bins * float(fun @ fun) / (m - p)  # residual variance of the log-PSD fit, per independent bin
    try:
        cov = s2 * np.linalg.pinv(jac.T @ jac)  # pinv: a bound-active parameter may leave J^T J singular
    except np.linalg.LinAlgError:
        return np.nan, np.nan
    return float(np.sqrt(max(cov[1, 1], 0.0))), float(zeta * np.sqrt(max(cov[2, 2], 0.0)))  # d zeta = zeta d x_2


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


# ------------------------------------------------------------------------------------------ live Welch
@dataclass(frozen=True, slots=True)
class WelchSettings:
    """Knobs of :class:`WelchAccumulator`.

    nperseg : L, samples per segment (>= 16); bins are fs / L apart
    segments_per_estimate : segments averaged into one PSD (>= 1)
    dt_s : nominal sample period [s]; a step over ``max_step_ratio`` times it ends the open segment
    band_hz : search band of :func:`estimate_mode` [Hz]
    max_step_ratio : largest step, in nominal periods, still counted as uniform sampling
    """

    nperseg: int
    segments_per_estimate: int
    dt_s: float
    band_hz: tuple[float, float] = (5.0, 80.0)
    max_step_ratio: float = 1.5

    def __post_init__(self) -> None:
        if self.nperseg < 16:
            raise ConfigurationError(f"nperseg: need at least 16 samples per segment, got {self.nperseg!r}")
        if self.segments_per_estimate < 1:
            raise ConfigurationError(f"segments_per_estimate: must be >= 1, got {self.segments_per_estimate!r}")
        if not self.dt_s > 0.0:
            raise ConfigurationError(f"dt_s: must be positive, got {self.dt_s!r}")
        if not self.max_step_ratio > 1.0:
            raise ConfigurationError(f"max_step_ratio: must be above 1, got {self.max_step_ratio!r}")
        if not 0.0 <= self.band_hz[0] < self.band_hz[1]:
            raise ConfigurationError(f"band_hz: need 0 <= low < high, got {self.band_hz!r}")

    @property
    def hop(self) -> int:
        """Samples between segment starts: L - L // 2 (the overlap of scipy.signal.welch's default)."""
        return self.nperseg - self.nperseg // 2

    @classmethod
    def for_window(
        cls, *, segment_s: float, window_s: float, dt_s: float, band_hz: tuple[float, float] = (5.0, 80.0)
    ) -> WelchSettings:
        """Settings from durations: L = round(segment_s / dt_s) samples, and as many segments as a continuous
        ``window_s`` of stream holds, ``floor((window_s / dt_s - L) / hop) + 1`` (at least 1)."""
        if not (segment_s > 0.0 and window_s > 0.0 and dt_s > 0.0):
            raise ConfigurationError("segment_s, window_s and dt_s must be positive")
        nperseg = int(round(segment_s / dt_s))
        hop = nperseg - nperseg // 2
        segments = max(int(np.floor((window_s / dt_s - nperseg) / hop + 1e-9)) + 1, 1)
        return cls(nperseg=nperseg, segments_per_estimate=segments, dt_s=dt_s, band_hz=band_hz)


@dataclass(frozen=True, slots=True)
class WelchEstimate:
    """One completed Welch average and the mode fitted to it.

    start_s, end_s : first sample of its first segment and last sample of its last segment [s]
    segments : segments averaged
    f, S : (F,) frequencies [Hz] and the mean PSD, summed over actuators [unit^2/Hz]
    mode : :class:`ModeEstimate` of S (:func:`estimate_mode` over the settings' band)
    """

    start_s: float
    end_s: float
    segments: int
    f: Array
    S: Array
    mode: ModeEstimate


class WelchAccumulator:
    """Welch PSD of a residual stream, summed over actuators, built segment by segment across batches.

    The running state is the open segment (fewer than L samples), the PSD sum (F,) and three numbers; see
    the module docstring, equation (3). A step longer than ``max_step_ratio`` nominal periods (a gap in the
    stream) drops the open segment: every segment is uniformly sampled. The sum does not restart at a gap
    (segments on either side average as well as any two), only after ``segments_per_estimate`` segments.
    """

    def __init__(self, n_channels: int, settings: WelchSettings) -> None:
        if n_channels < 1:
            raise ConfigurationError(f"n_channels: must be >= 1, got {n_channels!r}")
        self.n = n_channels
        self.settings = settings
        L = settings.nperseg
        self._window = get_window("hann", L)  # periodic Hann, as scipy.signal.welch
        self._scale = 1.0 / (np.sum(self._window**2) / settings.dt_s)  # density scaling 1 / (fs sum w^2)
        self._gain = np.full(L // 2 + 1, 2.0)  # one-sided: twice every bin but 0 Hz (and Nyquist for even L)
        self._gain[0] = 1.0
        if L % 2 == 0:
            self._gain[-1] = 1.0
        self.f = np.fft.rfftfreq(L, settings.dt_s)
        self._part_t = np.zeros(0)
        self._part_r = np.zeros((0, n_channels))
        self._sum = np.zeros(self.f.shape[0])
        self._segments = 0
        self._start_s = np.nan  # first sample of the sum's first segment
        self._end_s = np.nan  # last sample of its latest segment
        self._last_t_s = np.nan  # newest sample seen

    @property
    def segments(self) -> int:
        """Segments in the running sum."""
        return self._segments

    def periodograms(self, r: Array) -> Array:
        """Periodograms (3) of the segments of r (K, L, n), summed over channels: (K, F)."""
        x = r - r.mean(axis=1, keepdims=True)  # detrend="constant": each segment's own mean
        X = np.fft.rfft(x * self._window[None, :, None], axis=1)  # (K, F, n)
        return (X.real**2 + X.imag**2).sum(axis=2) * (self._scale * self._gain)  # |X|^2 g / (fs sum w^2)

    def update(self, t: Array, r: Array) -> list[WelchEstimate]:
        """Add a batch (t (N,) [s], r (N, n)); return the estimates it completed, oldest first."""
        expect_shape("t", t, (None,))
        expect_shape("r", r, (t.shape[0], self.n))
        expect_finite("t", t)
        expect_finite("r", r)
        if t.shape[0] == 0:
            return []
        if np.any(np.diff(t) <= 0.0):
            raise TimeOrderError("t: sample times must be strictly increasing")
        if t[0] <= self._last_t_s:  # False while NaN (nothing seen yet)
            raise TimeOrderError(f"t: batch starts at {t[0]!r} s, not after {self._last_t_s!r} s")
        s = self.settings
        T = np.concatenate((self._part_t, t))
        R = np.concatenate((self._part_r, r))
        self._last_t_s = float(t[-1])
        breaks = np.flatnonzero(np.diff(T) > s.max_step_ratio * s.dt_s) + 1  # a gap: the run before it ends
        bounds = [0, *breaks.tolist(), T.shape[0]]
        done: list[WelchEstimate] = []
        L, hop = s.nperseg, s.hop
        for a, b in zip(bounds[:-1], bounds[1:], strict=True):  # loop over uniformly sampled runs (gaps are rare)
            count = (b - a - L) // hop + 1 if b - a >= L else 0  # complete segments in the run
            if count:
                starts = a + hop * np.arange(count)
                segs = np.lib.stride_tricks.sliding_window_view(R[a:b], L, axis=0)[::hop][:count]  # (K, n, L)
                P = self.periodograms(np.swapaxes(segs, 1, 2))
                self._add(P, T[starts], T[starts + L - 1], done)
            if b == T.shape[0]:  # the last run: its tail is the open segment
                keep = a + hop * count if count else a
                self._part_t, self._part_r = T[keep:b].copy(), R[keep:b].copy()
        return done

    def _add(self, P: Array, seg_start: Array, seg_end: Array, done: list[WelchEstimate]) -> None:
        """Add periodograms P (K, F) in order, closing an estimate whenever the sum is full."""
        s = self.settings
        i = 0
        while i < P.shape[0]:  # loop over completed estimates, each chunk summed at once
            if self._segments == 0:
                self._start_s = float(seg_start[i])
            take = min(s.segments_per_estimate - self._segments, P.shape[0] - i)
            self._sum += P[i : i + take].sum(axis=0)
            self._segments += take
            self._end_s = float(seg_end[i + take - 1])
            i += take
            if self._segments == s.segments_per_estimate:
                S = self._sum / self._segments  # Welch: mean of the periodograms
                mode = estimate_mode(self.f, S, band_hz=s.band_hz)
                done.append(WelchEstimate(self._start_s, self._end_s, self._segments, self.f.copy(), S, mode))
                self._sum = np.zeros_like(self._sum)
                self._segments = 0
                self._start_s = self._end_s = np.nan

    def save(self, prefix: str) -> dict[str, np.ndarray]:
        """The running state as arrays (exact)."""
        return {
            f"{prefix}part_t": self._part_t.copy(),
            f"{prefix}part_r": self._part_r.copy(),
            f"{prefix}psd_sum": self._sum.copy(),
            f"{prefix}segments": np.array(self._segments),
            f"{prefix}times_s": np.array([self._start_s, self._end_s, self._last_t_s]),
        }

    def restore(self, state: dict[str, np.ndarray], prefix: str) -> None:
        """Resume from :meth:`save`'s arrays; a PSD sum of another length (other settings) restarts the sum."""
        self._part_t = np.asarray(state[f"{prefix}part_t"], dtype=float).copy()
        self._part_r = np.asarray(state[f"{prefix}part_r"], dtype=float).reshape(-1, self.n).copy()
        self._start_s, self._end_s, self._last_t_s = (float(v) for v in state[f"{prefix}times_s"])
        psd_sum = np.asarray(state[f"{prefix}psd_sum"], dtype=float)
        self._sum, self._segments = psd_sum.copy(), int(state[f"{prefix}segments"])
        if psd_sum.shape != self.f.shape or self._part_t.shape[0] >= self.settings.nperseg:
            self._part_t, self._part_r = np.zeros(0), np.zeros((0, self.n))
            self._sum, self._segments = np.zeros_like(self.f), 0
            self._start_s = self._end_s = np.nan

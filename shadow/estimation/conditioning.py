"""Signal conditioning: Savitzky-Golay differentiation of actuator positions, time-aligned with every other signal.

The controller streams actuator positions q and efforts; the rigid-body regressor also needs qd and qdd. They are
taken from a least-squares polynomial fitted to a window of ``W = 2 m + 1`` consecutive samples and evaluated at the
window's centre (Savitzky and Golay, Anal. Chem. 36 (1964) 1627; Schafer, "What is a Savitzky-Golay filter?",
IEEE Signal Processing Magazine 28 (2011) 111; citations from memory). In real time the window can only be centred on a
sample once the m samples after it have arrived, so **every output lags the newest input by m samples** (m dt at a
uniform period dt). To keep the outputs time-aligned, every other signal (measured effort, temperatures, tool state,
timestamps) leaves the conditioner taken at the same centre sample: all of it is delayed by the same m samples.

Irregular sampling: the polynomial is fitted in the samples' actual times, one small least-squares problem per
output sample (vectorised over the batch; QR by modified Gram-Schmidt, never normal equations). On a uniform grid
this is the classic Savitzky-Golay filter (same weights as ``scipy.signal.savgol_coeffs``, to rounding); on a
jittered grid it needs no resampling, so no interpolation error and no extra delay. Cost: about 2-5 us per output
sample on the 2-core test machine (W = 21, d = 3), the largest share of the tracker's time.

Gaps: a time step longer than ``max_gap_s``, or one that is not positive (a repeated or backward timestamp), breaks
the stream into segments. A window never spans a break: conditioning restarts, the last m samples before the break
get no output, and output resumes once 2 m + 1 samples of the new segment have arrived. Each break is reported as a
:class:`Restart`.

Symbols
-------
t       : (N,) sample times [s], strictly increasing inside a segment
q       : (N, n) actuator positions [rad | m]
qd, qdd : (N, n) velocity [rad/s | m/s] and acceleration [rad/s^2 | m/s^2] at the window centre
m       : half window; W = 2 m + 1 samples per window; delay = m samples
d       : polynomial order, 2 <= d < W (acceleration needs d >= 2)
s       : (W,) window times relative to the centre, scaled by the window's half span h: s = (t_j - t_c) / h
V       : (W, d + 1) Vandermonde matrix V_jk = s_j^k; coefficients c = V^+ y; y^(r)(t_c) = r! c_r / h^r

Predicted effort: the measured effort has passed through the drive's current loop, so the model's prediction must
pass through the same first-order lag before the two are compared (:func:`lag_like_measurement`, which calls
:func:`shadow.robots.drives.current_loop_lag` segment by segment).
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np
from numpy.lib.stride_tricks import sliding_window_view
from numpy.typing import NDArray

from shadow.errors import ConfigurationError, ShapeError, expect_finite, expect_shape
from shadow.robots.drives import current_loop_lag

Array = NDArray[np.float64]

REASON_GAP = "gap"  # the step exceeded max_gap_s
REASON_NOT_INCREASING = "time not increasing"  # the step was zero or negative


def _check_window(half_window: int, poly_order: int) -> None:
    if half_window < 1:
        raise ConfigurationError(f"half_window: must be >= 1, got {half_window}")
    if not 2 <= poly_order < 2 * half_window + 1:
        raise ConfigurationError(
            f"poly_order: must satisfy 2 <= poly_order < 2 * half_window + 1 = {2 * half_window + 1}, got {poly_order}"
        )


def savgol_weights(half_window: int, poly_order: int, deriv: int, delta_s: float) -> Array:
    """Weights w (W,) of the r-th derivative at the centre of a uniform window, oldest sample first.

    ``y^(r)(t_c) = w @ y_window``; the least-squares polynomial of degree ``poly_order`` evaluated at the centre
    (Schafer 2011; equation numbers from memory omitted). Same layout as ``scipy.signal.savgol_coeffs(..., use="dot")``.

    Parameters
    ----------
    half_window : m, window of 2 m + 1 samples
    poly_order : d
    deriv : r, 0 <= r <= d
    delta_s : uniform sample period [s]
    """
    if not 0 <= deriv <= poly_order:
        raise ConfigurationError(f"deriv: must be in [0, poly_order={poly_order}], got {deriv}")
    if half_window < 1 or not 0 <= poly_order < 2 * half_window + 1:
        raise ConfigurationError(f"poly_order {poly_order} / half_window {half_window}: need poly_order < 2 m + 1")
    if not delta_s > 0:
        raise ConfigurationError(f"delta_s: must be > 0, got {delta_s}")
    s = np.arange(-half_window, half_window + 1, dtype=float) / half_window  # s_j = j / m, in [-1, 1]
    V = s[:, None] ** np.arange(poly_order + 1)[None, :]  # V_jk = s_j^k
    Qm, Rm = np.linalg.qr(V)  # V = Q R
    G = np.linalg.solve(Rm, Qm.T)  # V^+ = R^-1 Q^T, rows give the coefficients c_k
    h = half_window * delta_s  # half span [s]
    w: Array = math.factorial(deriv) * G[deriv] / h**deriv  # y^(r)(0) = r! c_r / h^r
    return w


def local_derivatives(t_win: Array, y_win: Array, poly_order: int) -> tuple[Array, Array]:
    """Velocity and acceleration at the centre of each window, polynomial fitted in the actual sample times.

    Parameters
    ----------
    t_win : (N, W) sample times of each window [s], W odd, strictly increasing along axis 1
    y_win : (N, W, n) values in each window
    poly_order : d, 2 <= d < W

    Returns
    -------
    yd, ydd : (N, n) first and second derivative at the centre sample t_win[:, W // 2]
    """
    n_windows, width = t_win.shape
    expect_shape("y_win", y_win, (n_windows, width, None))
    centre = width // 2
    half_span = 0.5 * (t_win[:, -1] - t_win[:, 0])  # h (N,) [s]
    s = (t_win - t_win[:, centre : centre + 1]) / half_span[:, None]  # s_j = (t_j - t_c) / h, in about [-1, 1]
    G = _pseudo_inverse_rows(s, poly_order)  # V^+ (d+1 rows of (N, W))
    w1 = G[1] / half_span[:, None]  # y'(t_c) = 1! c_1 / h
    w2 = 2.0 * G[2] / half_span[:, None] ** 2  # y''(t_c) = 2! c_2 / h^2
    yd = np.einsum("kw,kwn->kn", w1, y_win)
    ydd = np.einsum("kw,kwn->kn", w2, y_win)
    return yd, ydd


def _pseudo_inverse_rows(s: Array, poly_order: int) -> list[Array]:
    """Rows of V^+ = R^-1 Q^T for the Vandermonde matrices V_jk = s_j^k of every window, s (N, W).

    Modified Gram-Schmidt QR (Golub and Van Loan, "Matrix Computations", 4th ed., 2013, sec. 5.2, from memory)
    vectorised over the N windows, then back substitution; loops run over the d + 1 columns only (numpy's stacked
    QR costs more on these tiny matrices). With s in [-1, 1] and d <= 5 the columns are far from dependent.
    """
    n_cols = poly_order + 1
    q_cols: list[Array] = []
    R = np.zeros((n_cols, n_cols, s.shape[0]))
    for j in range(n_cols):
        v = s**j  # column j of V
        for i in range(j):
            R[i, j] = np.sum(q_cols[i] * v, axis=1)  # r_ij = q_i . v (against the updated v: MGS)
            v = v - R[i, j][:, None] * q_cols[i]
        R[j, j] = np.sqrt(np.sum(v * v, axis=1))
        q_cols.append(v / R[j, j][:, None])
    G: list[Array] = [np.zeros(0)] * n_cols
    for i in range(n_cols - 1, -1, -1):  # R G = Q^T, upper triangular: bottom row first
        acc = q_cols[i]
        for j in range(i + 1, n_cols):
            acc = acc - R[i, j][:, None] * G[j]
        G[i] = acc / R[i, i][:, None]
    return G


@dataclass(frozen=True, slots=True)
class Restart:
    """Conditioning restarted before the sample at ``t_s`` because the preceding step was ``gap_s`` long."""

    t_s: float  # time of the first sample of the new segment [s]
    gap_s: float  # the step that broke the stream [s] (<= 0 for a non-increasing timestamp)
    reason: str  # REASON_GAP or REASON_NOT_INCREASING


@dataclass(frozen=True, slots=True)
class ConditionedBatch:
    """Time-aligned conditioner output: every field is taken at the same (centre) samples.

    ``segment_start[k]`` is True where output k is the first of a segment (the first output ever, or the first after
    a restart); recursive filters downstream (the current-loop lag) reset there. ``restart_before[r]`` is the index
    of the first output after restart r (``K`` when that output is not ready yet: it will come in a later batch).
    """

    t: Array  # (K,) [s]
    q: Array  # (K, n)
    qd: Array  # (K, n)
    qdd: Array  # (K, n)
    channels: dict[str, Array]  # name -> (K, width), delayed by the same m samples
    segment_start: NDArray[np.bool_]  # (K,)
    restarts: tuple[Restart, ...]
    restart_before: NDArray[np.intp]  # (len(restarts),)

    @property
    def n_samples(self) -> int:
        return int(self.t.shape[0])


class Conditioner:
    """Streaming Savitzky-Golay differentiator with time alignment of the other channels.

    Accepts batches of any size (also smaller than the window) and returns the outputs ready so far. The state is
    the tail of the current segment (at most 2 m samples) and can be saved and restored exactly.

    Parameters
    ----------
    n_actuators : n
    channels : name -> width of each extra signal carried along (float64, e.g. ``{"effort": n}``); values may be
        NaN (only t and q must be finite)
    half_window : m; the outputs are delayed by m samples
    poly_order : d, 2 <= d < 2 m + 1
    max_gap_s : a longer step restarts the conditioning [s]
    """

    def __init__(
        self,
        n_actuators: int,
        channels: Mapping[str, int],
        *,
        half_window: int,
        poly_order: int,
        max_gap_s: float,
    ) -> None:
        _check_window(half_window, poly_order)
        if not max_gap_s > 0:
            raise ConfigurationError(f"max_gap_s: must be > 0, got {max_gap_s}")
        self.n_actuators = int(n_actuators)
        self.channel_widths = {str(k): int(v) for k, v in channels.items()}
        self.half_window = int(half_window)
        self.poly_order = int(poly_order)
        self.max_gap_s = float(max_gap_s)
        self._t = np.zeros(0)
        self._q = np.zeros((0, self.n_actuators))
        self._ch = {k: np.zeros((0, w)) for k, w in self.channel_widths.items()}
        self._tail_starts_segment = True  # the tail's first sample is the first of its segment

    @property
    def delay_samples(self) -> int:
        """m: every output is the sample m steps before the newest input."""
        return self.half_window

    @property
    def window(self) -> int:
        """W = 2 m + 1."""
        return 2 * self.half_window + 1

    def feed(self, t: Array, q: Array, channels: Mapping[str, Array]) -> ConditionedBatch:
        """Append a batch (t (N,), q (N, n), channels name -> (N, width)) and return the aligned outputs ready."""
        t = np.asarray(t, dtype=float)
        expect_shape("t", t, (None,))
        n_new = t.shape[0]
        q = np.asarray(q, dtype=float)
        expect_shape("q", q, (n_new, self.n_actuators))
        expect_finite("t", t)
        expect_finite("q", q)
        if set(channels) != set(self.channel_widths):
            raise ShapeError(f"channels: expected {sorted(self.channel_widths)}, got {sorted(channels)}")
        new_ch = {}
        for name, width in self.channel_widths.items():
            a = np.asarray(channels[name], dtype=float)
            expect_shape(name, a, (n_new, width))
            new_ch[name] = a

        t_all = np.concatenate([self._t, t])
        q_all = np.concatenate([self._q, q])
        ch_all = {k: np.concatenate([self._ch[k], new_ch[k]]) for k in self.channel_widths}
        n_all = t_all.shape[0]
        m = self.half_window
        width = self.window

        dt = np.diff(t_all)  # (n_all - 1,) steps
        gap = dt > self.max_gap_s
        not_increasing = ~(dt > 0)
        brk = gap | not_increasing  # break between sample i and i + 1
        seg = np.concatenate([[0], np.cumsum(brk)])  # segment id of each sample
        restarts = tuple(
            Restart(
                t_s=float(t_all[i + 1]),
                gap_s=float(dt[i]),
                reason=REASON_NOT_INCREASING if not_increasing[i] else REASON_GAP,
            )
            for i in np.flatnonzero(brk)
        )
        seg_first = np.concatenate([[True], brk])  # sample i is the first of its segment in this buffer
        seg_first[0] = self._tail_starts_segment or n_all == 0

        if n_all >= width:
            start = np.flatnonzero(seg[: n_all - width + 1] == seg[width - 1 :])  # windows inside one segment
        else:
            start = np.zeros(0, dtype=np.intp)
        centre = start + m
        if start.size:
            t_win = sliding_window_view(t_all, width)[start]  # (K, W)
            q_win = np.swapaxes(sliding_window_view(q_all, width, axis=0)[start], 1, 2)  # (K, W, n)
            qd, qdd = local_derivatives(t_win, q_win, self.poly_order)
        else:
            qd = np.zeros((0, self.n_actuators))
            qdd = np.zeros((0, self.n_actuators))
        out = ConditionedBatch(
            t=t_all[centre].copy(),
            q=q_all[centre].copy(),
            qd=qd,
            qdd=qdd,
            channels={k: v[centre].copy() for k, v in ch_all.items()},
            segment_start=seg_first[start].copy(),
            restarts=restarts,
            restart_before=np.searchsorted(start, np.flatnonzero(brk) + 1),  # first window starting after the break
        )

        # keep the last (at most 2 m) samples of the last segment for the windows still to come
        if n_all:
            last_first = int(np.flatnonzero(seg == seg[-1])[0])
            keep_from = max(last_first, n_all - 2 * m)
            self._tail_starts_segment = bool(keep_from == last_first and seg_first[last_first])
            self._t = t_all[keep_from:].copy()
            self._q = q_all[keep_from:].copy()
            self._ch = {k: v[keep_from:].copy() for k, v in ch_all.items()}
        return out

    def save_state(self) -> dict[str, Array]:
        """The tail buffer as plain arrays (copies); :meth:`restore_state` brings it back exactly."""
        state = {
            "t": self._t.copy(),
            "q": self._q.copy(),
            "tail_starts_segment": np.array(self._tail_starts_segment),
        }
        state.update({f"channel/{k}": v.copy() for k, v in self._ch.items()})
        return state

    def restore_state(self, state: Mapping[str, Array]) -> None:
        """Restore the tail saved by :meth:`save_state` (shapes checked)."""
        t = np.asarray(state["t"], dtype=float)
        expect_shape("state t", t, (None,))
        n_tail = t.shape[0]
        if n_tail > 2 * self.half_window:
            raise ShapeError(f"state t: at most {2 * self.half_window} tail samples, got {n_tail}")
        q = np.asarray(state["q"], dtype=float)
        expect_shape("state q", q, (n_tail, self.n_actuators))
        ch = {}
        for name, width in self.channel_widths.items():
            a = np.asarray(state[f"channel/{name}"], dtype=float)
            expect_shape(f"state channel/{name}", a, (n_tail, width))
            ch[name] = a.copy()
        self._t, self._q, self._ch = t.copy(), q.copy(), ch
        self._tail_starts_segment = bool(state["tail_starts_segment"])


def lag_like_measurement(
    t: Array,
    u: Array,
    segment_start: NDArray[np.bool_],
    bandwidth_hz: Array,
    y_prev: Array | None,
    t_prev_s: float,
) -> tuple[Array, Array, float]:
    """Pass predicted efforts (or regressor columns) u through the current-loop lag, as the measurement was.

    ``y_k = y_{k-1} + (1 - exp(-2 pi f dt_k)) (u_k - y_{k-1})`` per column (exact for a zero-order-held input), via
    :func:`shadow.robots.drives.current_loop_lag`. The lag starts settled on its input (``y = u``) at every
    conditioning restart (``segment_start``) and when there is no history (``y_prev`` None); otherwise it carries
    on from ``y_prev`` at ``t_prev_s``.

    Parameters
    ----------
    t : (N,) sample times [s], increasing inside a segment
    u : (N, c) values to lag, any unit
    segment_start : (N,) True where a new conditioning segment begins
    bandwidth_hz : (c,) bandwidth of the loop each column belongs to [Hz]
    y_prev, t_prev_s : lag output (c,) at the previous sample and its time [s], or None (no history)

    Returns
    -------
    (u_lag (N, c), y_last (c,), t_last_s): the lagged values and the state to pass on with the next batch.
    """
    n_samples = t.shape[0]
    expect_shape("u", u, (n_samples, None))
    if segment_start.shape != (n_samples,):
        raise ShapeError(f"segment_start: expected shape ({n_samples},), got {segment_start.shape}")
    out = np.empty_like(u)
    cuts = sorted({0, *np.flatnonzero(segment_start).tolist(), n_samples})
    y_last = y_prev
    t_last = t_prev_s
    for a, b in zip(cuts[:-1], cuts[1:], strict=True):  # loop over conditioning segments, not samples
        fresh = bool(segment_start[a]) or y_last is None
        dt0 = 0.0 if fresh else t[a] - t_last  # step ending at the segment's first sample
        dt = np.concatenate([[dt0], np.diff(t[a:b])])
        out[a:b] = current_loop_lag(u[a:b], dt, bandwidth_hz, None if fresh else y_last)
        y_last = out[b - 1].copy()
        t_last = float(t[b - 1])
    if y_last is None:
        y_last = np.zeros(0)
    return out, y_last, t_last

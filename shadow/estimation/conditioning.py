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

Efforts and motion at their own instants: the reported effort at t_k belongs to the motion at ``t_k - d`` (d per
actuator, :func:`shadow.robots.drives.reported_effort_delay_s`: about half a control period for an actual effort
under a held command, minus half a period and the current loop's time constant for a streamed command). The
polynomial of each window is therefore also evaluated at ``t_c - d`` (value, first and second derivative;
:func:`local_motion`), which needs no extra delay as long as ``|d|`` stays inside the window, and
:func:`regressor_at_efforts` evaluates the rigid-body regressor there, one call per distinct delay.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np
from numpy.lib.stride_tricks import sliding_window_view
from numpy.typing import NDArray

from shadow.errors import ConfigurationError, ShapeError, expect_finite, expect_shape
from shadow.robots.mechanism import Mechanism

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


@dataclass(frozen=True, slots=True)
class WindowFit:
    """The least-squares polynomial of degree d through every window, in the windows' actual sample times.

    With ``s_j = (t_j - t_c) / h`` (t_c the centre sample, h the half span) the coefficients are ``c = V^+ y``
    for the Vandermonde matrix ``V_jk = s_j^k``; ``pinv[k]`` holds row k of V^+ for every window, laid out
    (W, N) so that the sums over a window run along the long axis. Build it once per batch (:meth:`of`) and
    evaluate it as often as needed: the pseudo-inverse is the expensive part.
    """

    pinv: Array  # (d + 1, W, N) rows of V^+
    half_span_s: Array  # (N,) h [s]

    @classmethod
    def of(cls, t_win: Array, poly_order: int) -> WindowFit:
        """Fit for windows of sample times t_win (N, W), W odd, strictly increasing along axis 1."""
        centre = t_win.shape[1] // 2
        half_span = 0.5 * (t_win[:, -1] - t_win[:, 0])
        s = (t_win - t_win[:, centre : centre + 1]) / half_span[:, None]  # s_j in about [-1, 1]
        return cls(_pseudo_inverse_rows(np.ascontiguousarray(s.T), poly_order), half_span)

    @property
    def poly_order(self) -> int:
        return int(self.pinv.shape[0]) - 1

    def coefficients(self, y_win: Array) -> Array:
        """c = V^+ y (d + 1, N, n) of every window's polynomial ``y(s) = sum_k c_k s^k`` (y_win (N, W, n))."""
        return np.einsum("kwm,mwn->kmn", self.pinv, y_win)

    def derivatives(self, y_win: Array, c: Array | None = None) -> tuple[Array, Array]:
        """(yd, ydd) (N, n) at the centre samples: ``y'(t_c) = 1! c_1 / h``, ``y''(t_c) = 2! c_2 / h^2``.

        ``c``: the :meth:`coefficients` of ``y_win`` when already at hand.
        """
        c = self.coefficients(y_win) if c is None else c
        h = self.half_span_s[:, None]
        return c[1] / h, 2.0 * c[2] / h**2

    def motion(self, y_win: Array, offset_s: Array, c: Array | None = None) -> tuple[Array, Array, Array]:
        """(y, yd, ydd) (N, n) at ``t_c + offset_s`` (offset_s (N,) [s]).

        ``y = sum_k c_k x^k``, ``yd = sum_k k c_k x^(k-1) / h``, ``ydd = sum_k k (k - 1) c_k x^(k-2) / h^2``
        with ``x = offset_s / h``, by Horner's scheme on the coefficients (``c`` as in :meth:`derivatives`).
        """
        c = self.coefficients(y_win) if c is None else c
        x = (offset_s / self.half_span_s)[:, None]  # evaluation point in window units
        d = self.poly_order
        y = c[d].copy()
        yd = d * c[d]
        ydd = d * (d - 1) * c[d]
        for k in range(d - 1, -1, -1):  # loop over the polynomial's coefficients, not samples
            y = y * x + c[k]
            if k >= 1:
                yd = yd * x + k * c[k]
            if k >= 2:
                ydd = ydd * x + k * (k - 1) * c[k]
        h = self.half_span_s[:, None]
        return y, yd / h, ydd / h**2


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
    return WindowFit.of(t_win, poly_order).derivatives(y_win)


def local_motion(t_win: Array, y_win: Array, poly_order: int, offset_s: Array) -> tuple[Array, Array, Array]:
    """Value, velocity and acceleration of each window's polynomial at ``t_c + offset_s`` (fitted in the actual times).

    Parameters
    ----------
    t_win : (N, W) sample times of each window [s], W odd, strictly increasing along axis 1
    y_win : (N, W, n) values in each window
    poly_order : d, 2 <= d < W
    offset_s : (N,) evaluation time relative to the centre sample t_win[:, W // 2] [s]

    Returns
    -------
    y, yd, ydd : (N, n) at ``t_c + offset_s`` (see :meth:`WindowFit.motion`; the same fit as
    :func:`local_derivatives`, which is the case offset 0 for the derivatives)
    """
    n_windows, width = t_win.shape
    expect_shape("y_win", y_win, (n_windows, width, None))
    expect_shape("offset_s", offset_s, (n_windows,))
    return WindowFit.of(t_win, poly_order).motion(y_win, offset_s)


def _pseudo_inverse_rows(s_t: Array, poly_order: int) -> Array:
    """Rows of V^+ = R^-1 Q^T for the Vandermonde matrices V_jk = s_j^k of every window; s_t (W, N), out (d+1, W, N).

    Modified Gram-Schmidt QR (Golub and Van Loan, "Matrix Computations", 4th ed., 2013, sec. 5.2, from memory)
    vectorised over the N windows, then back substitution; loops run over the d + 1 columns only (numpy's stacked
    QR costs more on these tiny matrices). The windows run along the last axis, so every sum over a window adds
    rows of length N (about 3 times faster than summing short rows). With s in [-1, 1] and d <= 5 the columns are
    far from dependent.
    """
    n_cols = poly_order + 1
    powers = [np.ones_like(s_t)]
    for _ in range(1, n_cols):
        powers.append(powers[-1] * s_t)
    q_cols: list[Array] = []
    R = np.zeros((n_cols, n_cols, s_t.shape[1]))
    for j in range(n_cols):
        v = powers[j].copy()  # column j of V
        for i in range(j):
            R[i, j] = (q_cols[i] * v).sum(axis=0)  # r_ij = q_i . v (against the updated v: MGS)
            v -= R[i, j] * q_cols[i]
        R[j, j] = np.sqrt((v * v).sum(axis=0))
        v /= R[j, j]
        q_cols.append(v)
    G = np.empty((n_cols, *s_t.shape))
    for i in range(n_cols - 1, -1, -1):  # R G = Q^T, upper triangular: bottom row first
        acc = q_cols[i].copy()
        for j in range(i + 1, n_cols):
            acc -= R[i, j] * G[j]
        acc /= R[i, i]
        G[i] = acc
    return G


@dataclass(frozen=True, slots=True)
class Restart:
    """Conditioning restarted before the sample at ``t_s`` because the preceding step was ``gap_s`` long."""

    t_s: float  # time of the first sample of the new segment [s]
    gap_s: float  # the step that broke the stream [s] (<= 0 for a non-increasing timestamp)
    reason: str  # REASON_GAP or REASON_NOT_INCREASING


@dataclass(frozen=True, slots=True)
class EffortMotion:
    """The motion at the instants the reported efforts belong to, ``t_k - d_i``, one evaluation per distinct delay.

    Actuator i's effort belongs to evaluation ``group[i]``; a group of delay 0 holds the centre samples themselves
    (the raw q with the window's qd and qdd), any other group the window polynomial at ``t_k - d``.
    """

    delay_s: Array  # (G,) d of each group [s]
    group: NDArray[np.intp]  # (n,) group of each actuator's effort
    q: Array  # (G, K, n)
    qd: Array  # (G, K, n)
    qdd: Array  # (G, K, n)

    @property
    def n_groups(self) -> int:
        return int(self.delay_s.shape[0])

    def own_velocity(self) -> Array:
        """(K, n): each actuator's velocity at its own effort's instant (for its friction)."""
        idx = np.arange(self.group.shape[0])
        return self.qd[self.group, :, idx].T.copy()

    def take(self, rows: slice | NDArray[np.intp]) -> EffortMotion:
        """The same groups for a subset of the samples."""
        return EffortMotion(self.delay_s, self.group, self.q[:, rows], self.qd[:, rows], self.qdd[:, rows])


def regressor_at_efforts(mechanism: Mechanism, motion: EffortMotion) -> tuple[Array, Array, Array]:
    """``(tau_known (K, n), Y_p (K, n, p), qd (K, n))`` with each actuator's rows taken at its effort's instant.

    One rigid-regressor call per group (one in the usual case of drives that share their timing); actuator i's
    rows come from the call of its group, and ``qd[:, i]`` is its velocity there (for the friction regressor).
    """
    tau_known = Y_p = None
    for g in range(motion.n_groups):  # loop over distinct delays, not samples
        tk, yp = mechanism.rigid_regressor(motion.q[g], motion.qd[g], motion.qdd[g])
        if tau_known is None or Y_p is None:
            tau_known, Y_p = tk, yp
            continue
        rows = motion.group == g
        tau_known[:, rows] = tk[:, rows]
        Y_p[:, rows] = yp[:, rows]
    if tau_known is None or Y_p is None:
        raise ConfigurationError("effort motion: no groups")
    return tau_known, Y_p, motion.own_velocity()


def effort_groups(effort_delay_s: Array | None, n_actuators: int) -> tuple[Array, NDArray[np.intp]]:
    """(delays (G,) [s], group (n,)) of per-actuator effort delays (None: all 0), the delays in first-seen order."""
    d = np.zeros(n_actuators) if effort_delay_s is None else np.asarray(effort_delay_s, dtype=float)
    expect_shape("effort_delay_s", d, (n_actuators,))
    expect_finite("effort_delay_s", d)
    delays: list[float] = []
    group = np.empty(n_actuators, dtype=np.intp)
    for i, value in enumerate(d.tolist()):  # n actuators, a handful
        if value not in delays:
            delays.append(value)
        group[i] = delays.index(value)
    return np.array(delays, dtype=float), group


@dataclass(frozen=True, slots=True)
class ConditionedBatch:
    """Time-aligned conditioner output: every field is taken at the same (centre) samples.

    ``segment_start[k]`` is True where output k is the first of a segment (the first output ever, or the first after
    a restart); recursive filters downstream reset there. ``restart_before[r]`` is the index
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
    effort_motion: EffortMotion  # the motion at the efforts' own instants (the centre samples for zero delays)

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
    effort_delay_s : (n,) delay d of each reported effort behind the motion [s] (negative: it leads), or None for 0;
        the batch's :class:`EffortMotion` is taken at ``t_k - d``. ``|d|`` must stay within each window's half span.
    """

    def __init__(
        self,
        n_actuators: int,
        channels: Mapping[str, int],
        *,
        half_window: int,
        poly_order: int,
        max_gap_s: float,
        effort_delay_s: Array | None = None,
    ) -> None:
        _check_window(half_window, poly_order)
        if not max_gap_s > 0:
            raise ConfigurationError(f"max_gap_s: must be > 0, got {max_gap_s}")
        self.n_actuators = int(n_actuators)
        self.channel_widths = {str(k): int(v) for k, v in channels.items()}
        self.half_window = int(half_window)
        self.poly_order = int(poly_order)
        self.max_gap_s = float(max_gap_s)
        self.effort_delays_s, self.effort_group = effort_groups(effort_delay_s, self.n_actuators)
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
        n_out = start.size
        groups = self.effort_delays_s.shape[0]
        motion = np.zeros((3, groups, n_out, self.n_actuators))  # (q, qd, qdd) of each group
        if start.size:
            t_win = sliding_window_view(t_all, width)[start]  # (K, W)
            q_win = np.swapaxes(sliding_window_view(q_all, width, axis=0)[start], 1, 2)  # (K, W, n)
            fit = WindowFit.of(t_win, self.poly_order)  # one fit for every evaluation below
            c = fit.coefficients(q_win)
            qd, qdd = fit.derivatives(q_win, c)
            half_span = fit.half_span_s
            for g, d in enumerate(self.effort_delays_s.tolist()):  # loop over distinct delays, not samples
                if d == 0.0:
                    motion[:, g] = q_all[centre], qd, qdd
                    continue
                if np.any(abs(d) > half_span):
                    k = int(np.argmax(abs(d) > half_span))
                    raise ConfigurationError(
                        f"effort_delay_s: {d:.3g} s reaches outside the conditioning window at "
                        f"t = {t_all[centre[k]]:.6f} s (half span {half_span[k]:.3g} s); take a longer half_window"
                    )
                motion[:, g] = fit.motion(q_win, np.full(n_out, -d), c)  # at t_c - d
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
            effort_motion=EffortMotion(self.effort_delays_s.copy(), self.effort_group.copy(), *motion),
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

"""Generalized-momentum observer in actuator coordinates, its thresholds and collision events.

The observer (De Luca and Mattone, ICRA 2003; Haddadin, De Luca and Albu-Schaeffer, "Robot collisions:
a survey on detection, isolation, and identification", IEEE T-RO 33(6), 2017, the momentum-observer section) is

    p = M(q) qd                                              generalized momentum
    r(t) = K_O ( p(t) - p(0) - int_0^t (tau + C^T qd - g + r) ds )
         = K_O ( p(t) - p(0) - int_0^t (tau - beta + r) ds ),  beta = h - dM/dt qd

since dM/dt = C + C^T and h = C qd + g. With the momentum balance dp/dt = tau + tau_ext - beta the
residual obeys dr/dt = K_O (tau_ext - r): each component follows the external effort as a first-order
lag of time constant 1/K_O (the property the tests check). No acceleration is needed.

Discretisation (exact for a piecewise-constant external effort between samples)
-------------------------------------------------------------------------------
With s(t) = p(t) - int (tau - beta) ds the observer is dr/dt = K_O (ds/dt - r). Taking ds/dt constant on
each sample interval (p linear, tau - beta by the trapezoidal rule), the exact solution on
[t_{k-1}, t_k], dt_k = t_k - t_{k-1}, is

    w_k = (p_k - p_{k-1}) / dt_k - (u_k + u_{k-1}) / 2,      u = tau - beta
    a_k = exp(-K_O dt_k)
    r_k = a_k r_{k-1} + (1 - a_k) w_k                          (1)

a linear recursion with per-sample coefficients (timestamps need not be uniform). Batches are solved
in closed form, r_k = A_k (r_0 + sum_j b_j / A_j) with A_k = prod a_j, in blocks short enough that A
neither under- nor overflows: a loop over blocks (one per ~300 / K_O seconds), never over samples.

Symbols
-------
t        : (N,) sample times [s], strictly increasing
tau_meas : (N, n) measured joint-side efforts, friction-compensated by the caller [N m | N]
M        : (N, n, n) mass matrix [kg m^2 | kg]
beta     : (N, n) h - dM/dt qd [N m | N]
qd       : (N, n) actuator velocities [rad/s | m/s]
K_O      : (n,) observer gains [1/s]
r        : (N, n) residual, an estimate of the external effort tau_ext = J^T w [N m | N]

Thresholds
----------
Under healthy operation r is zero-mean noise; with its standard deviation sigma_r measured on baseline
data (after the observer has settled) the per-actuator threshold is ``z_(1 - alpha/2) sigma_r``, so a
Gaussian residual exceeds it on a fraction alpha of samples. An alarm starts only at a sample above
threshold, so the false-alarm rate is bounded by ``alpha * f_s`` per second whatever the correlation
of r; requiring a minimum duration above threshold only lowers it further (common practice, no
source). :func:`alpha_for_false_alarm_rate` inverts this bound.

On a real robot the healthy residual is not white noise: what the rigid model leaves out (the Stribeck rise,
heating, a lightly damped mode) follows the motion, and its peaks, not its standard deviation, set the false
alarms. :func:`extreme_value_thresholds` therefore models the peaks themselves: the maxima of ``|r|`` over
blocks of equal length follow a Gumbel law ``P(max <= x) = exp(-exp(-(x - mu) / s))`` (the extremal types
theorem; Coles, "An Introduction to Statistical Modeling of Extreme Values", Springer 2001, ch. 3), fitted by
maximum likelihood, and the threshold is the level a block exceeds with the probability the false-alarm
target allows (``p = rate * block length``): an extrapolation from minutes of healthy run to a day.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np
from numpy.typing import NDArray
from scipy.stats import gumbel_r, norm

from shadow.detection.events import CollisionEvent, as_float_array
from shadow.errors import ConfigurationError, ShapeError, TimeOrderError, expect_finite, expect_shape
from shadow.robots.mechanism import Mechanism

Array = NDArray[np.float64]

_BLOCK_LOG_DECAY = 300.0  # largest ln(A_start / A_end) inside one closed-form block (1)
_STEP_LOG_DECAY_CAP = 100.0  # exp(-100) ~ 4e-44: a longer gap forgets r entirely


@dataclass(frozen=True, slots=True)
class ObserverState:
    """What the observer carries from one batch to the next (the last sample seen).

    t_s : time of the last sample [s]; p : (n,) its momentum; u : (n,) its tau - beta; r : (n,) residual.
    """

    t_s: float
    p: Array
    u: Array
    r: Array


def observer_inputs(model: Mechanism, q: Array, qd: Array, theta_p: Array) -> tuple[Array, Array]:
    """(M (N, n, n), beta (N, n)) from a model: beta = h(q, qd) - dM/dt qd."""
    M = model.mass_matrix(q, theta_p)
    h = model.bias_efforts(q, qd, theta_p)
    Md = model.mass_matrix_rate(q, qd, theta_p)
    beta = h - np.einsum("kij,kj->ki", Md, qd)  # beta = h - dM/dt qd
    return M, beta


def linear_scan(a: Array, b: Array, y0: Array) -> Array:
    """Solve y_k = a_k y_{k-1} + b_k for k = 0..N-1 from y_{-1} = y0, column by column.

    Parameters
    ----------
    a : (N, n) coefficients in [0, 1]
    b : (N, n) inputs
    y0 : (n,) value before the first sample

    Returns
    -------
    (N, n) the sequence y, computed in closed form per block (see the module docstring).
    """
    n_samples = a.shape[0]
    y = np.empty_like(b)
    if n_samples == 0:
        return y
    with np.errstate(divide="ignore"):
        log_a = np.maximum(np.log(a), -_STEP_LOG_DECAY_CAP)  # ln a_k, a gap longer than the cap forgets
    worst = np.cumsum(log_a, axis=0).min(axis=1)  # most-decayed column, non-increasing in k
    block_id = np.floor(-worst / _BLOCK_LOG_DECAY)
    cuts = np.flatnonzero(np.diff(block_id)) + 1
    starts = np.concatenate(([0], cuts))
    ends = np.concatenate((cuts, [n_samples]))
    prev = np.asarray(y0, dtype=np.float64)
    for s, e in zip(starts, ends, strict=True):  # loop over blocks, not samples
        log_A = np.cumsum(log_a[s:e], axis=0)  # ln A_k relative to the block start, >= -400
        y[s:e] = np.exp(log_A) * (prev + np.cumsum(np.exp(-log_A) * b[s:e], axis=0))  # y_k = A_k (y0 + sum b_j/A_j)
        prev = y[e - 1]
    return y


def _check_inputs(t: Array, tau_meas: Array, M: Array, beta: Array, qd: Array, n: int) -> None:
    expect_shape("t", t, (None,))
    n_samples = t.shape[0]
    expect_shape("tau_meas", tau_meas, (n_samples, n))
    expect_shape("M", M, (n_samples, n, n))
    expect_shape("beta", beta, (n_samples, n))
    expect_shape("qd", qd, (n_samples, n))
    for name, a in (("t", t), ("tau_meas", tau_meas), ("M", M), ("beta", beta), ("qd", qd)):
        expect_finite(name, a)


def observer_step(
    state: ObserverState | None,
    t: Array,
    tau_meas: Array,
    M: Array,
    beta: Array,
    qd: Array,
    K_O: Array,
) -> tuple[Array, ObserverState]:
    """Run the observer over one batch; pure (returns the new state).

    Parameters
    ----------
    state : the previous batch's :class:`ObserverState`, or None to start here (r = 0 and p(0) taken
        at the first sample)
    t, tau_meas, M, beta, qd : see the module docstring
    K_O : (n,) observer gains [1/s], > 0

    Returns
    -------
    r : (N, n) residual [N m | N]
    state : the state after the last sample

    Raises
    ------
    ShapeError, NonFiniteError, TimeOrderError
    """
    K_O = np.asarray(K_O, dtype=np.float64)
    n = K_O.shape[0] if K_O.ndim == 1 else -1
    expect_shape("K_O", K_O, (None,))
    _check_inputs(t, tau_meas, M, beta, qd, n)
    if t.shape[0] == 0:
        if state is None:
            raise ShapeError("t: an empty first batch cannot start the observer")
        return np.zeros((0, n)), state
    p = np.einsum("kij,kj->ki", M, qd)  # p = M(q) qd
    u = tau_meas - beta  # u = tau - beta
    if state is None:
        t_prev = np.concatenate(([t[0]], t[:-1]))
        p_prev = np.concatenate((p[:1], p[:-1]))
        u_prev = np.concatenate((u[:1], u[:-1]))
        r0 = np.zeros(n)
        first = 1  # the first sample defines p(0); r_0 = 0
    else:
        t_prev = np.concatenate(([state.t_s], t[:-1]))
        p_prev = np.concatenate((state.p[None, :], p[:-1]))
        u_prev = np.concatenate((state.u[None, :], u[:-1]))
        r0 = state.r
        first = 0
    dt = t - t_prev
    if np.any(dt[first:] <= 0.0):
        k = int(np.flatnonzero(dt[first:] <= 0.0)[0]) + first
        raise TimeOrderError(f"t: sample {k} at {t[k]!r} s does not follow {t_prev[k]!r} s")
    dt_safe = np.where(dt > 0.0, dt, 1.0)[:, None]
    w = (p - p_prev) / dt_safe - 0.5 * (u + u_prev)  # w_k = dp/dt - mean(tau - beta) on the interval
    a = np.exp(-K_O[None, :] * dt[:, None])  # a_k = exp(-K_O dt_k)
    b = (1.0 - a) * w  # (1 - a_k) w_k; zero for the first sample of a fresh start (dt = 0)
    r = linear_scan(a, b, r0)  # r_k = a_k r_{k-1} + (1 - a_k) w_k   (1)
    return r, ObserverState(t_s=float(t[-1]), p=p[-1].copy(), u=u[-1].copy(), r=r[-1].copy())


class MomentumObserver:
    """Carries :class:`ObserverState` between batches; every calculation goes through :func:`observer_step`."""

    def __init__(self, K_O: Array) -> None:
        K_O = np.asarray(K_O, dtype=np.float64)
        expect_shape("K_O", K_O, (None,))
        if np.any(~(K_O > 0.0)):
            raise ConfigurationError(f"K_O: observer gains must be positive, got {K_O.tolist()}")
        self.K_O = K_O
        self._state: ObserverState | None = None

    def update(self, t: Array, tau_meas: Array, M: Array, beta: Array, qd: Array) -> Array:
        """Residual r (N, n) of this batch, continuing from the previous one."""
        r, self._state = observer_step(self._state, t, tau_meas, M, beta, qd, self.K_O)
        return r

    def save(self) -> ObserverState | None:
        """The state to persist (None before the first sample)."""
        return self._state

    def restore(self, state: ObserverState | None) -> None:
        """Continue from a saved state."""
        self._state = state


def residual_thresholds(r_baseline: Array, alpha: float, *, settle_samples: int = 0) -> Array:
    """Per-actuator thresholds ``z_(1 - alpha/2) sigma_r`` from a baseline residual.

    Parameters
    ----------
    r_baseline : (N, n) observer residual on healthy data [N m | N]
    alpha : two-sided per-sample exceedance probability of a Gaussian residual, in (0, 1)
    settle_samples : leading samples to drop (the observer's start-up transient)

    Returns
    -------
    (n,) thresholds [N m | N]
    """
    expect_shape("r_baseline", r_baseline, (None, None))
    if not 0.0 < alpha < 1.0:
        raise ConfigurationError(f"alpha: must lie in (0, 1), got {alpha!r}")
    tail = r_baseline[settle_samples:]
    if tail.shape[0] < 2:
        raise ShapeError(f"r_baseline: need at least 2 samples after settling, got {tail.shape[0]}")
    expect_finite("r_baseline", tail)
    sigma_r = tail.std(axis=0, ddof=1)  # sigma_r of the observer-filtered noise
    thr: Array = float(norm.isf(alpha / 2.0)) * sigma_r  # z_(1 - alpha/2) sigma_r (Gaussian tail)
    return thr


MIN_EXTREME_VALUE_BLOCKS = 20  # fewer block maxima make the Gumbel fit too loose to extrapolate from


def extreme_value_thresholds(
    r_baseline: Array, *, block_samples: int, exceedance_per_block: float, settle_samples: int = 0
) -> Array:
    """Per-actuator levels that the block maxima of ``|r|`` exceed with probability ``exceedance_per_block``.

    Parameters
    ----------
    r_baseline : (N, n) observer residual on healthy data [N m | N]
    block_samples : samples per block (one block should span at least a motion cycle)
    exceedance_per_block : p in (0, 1), e.g. false alarms per second * block length [s] / n actuators
    settle_samples : leading samples to drop (the observer's start-up transient)

    Returns
    -------
    (n,) thresholds ``x_p = mu - s ln(-ln(1 - p))`` of the Gumbel law fitted to the block maxima
    (Coles 2001, eq. 3.4) [N m | N]

    Raises
    ------
    ShapeError when fewer than ``MIN_EXTREME_VALUE_BLOCKS`` blocks remain; ConfigurationError for p or
    block_samples out of range.
    """
    expect_shape("r_baseline", r_baseline, (None, None))
    if block_samples < 1:
        raise ConfigurationError(f"block_samples: must be >= 1, got {block_samples!r}")
    if not 0.0 < exceedance_per_block < 1.0:
        raise ConfigurationError(f"exceedance_per_block: must lie in (0, 1), got {exceedance_per_block!r}")
    tail = np.abs(r_baseline[settle_samples:])
    expect_finite("r_baseline", tail)
    n_blocks = tail.shape[0] // block_samples
    if n_blocks < MIN_EXTREME_VALUE_BLOCKS:
        raise ShapeError(
            f"r_baseline: {n_blocks} blocks of {block_samples} samples after settling, "
            f"need at least {MIN_EXTREME_VALUE_BLOCKS} for the extreme-value fit"
        )
    maxima = tail[: n_blocks * block_samples].reshape(n_blocks, block_samples, -1).max(axis=1)  # (B, n)
    thr = np.empty(maxima.shape[1])
    for i in range(maxima.shape[1]):  # n is 3 or 6: a loop over actuators, not samples
        mu, scale = gumbel_r.fit(maxima[:, i])  # maximum-likelihood Gumbel fit of the block maxima
        thr[i] = gumbel_r.isf(exceedance_per_block, mu, scale)  # P(block max > x_p) = p
    return thr


def alpha_for_false_alarm_rate(false_alarms_per_hour: float, sample_rate_hz: float) -> float:
    """Per-sample alpha whose bound ``alpha f_s`` equals the target false-alarm rate."""
    if false_alarms_per_hour <= 0.0 or sample_rate_hz <= 0.0:
        raise ConfigurationError("false_alarms_per_hour and sample_rate_hz must be positive")
    return min(false_alarms_per_hour / 3600.0 / sample_rate_hz, 0.5)  # rate <= alpha f_s


@dataclass(frozen=True, slots=True)
class CollisionSettings:
    """Knobs of the collision detector.

    threshold : (n,) residual thresholds [N m | N] (see :func:`residual_thresholds`)
    rated_effort : (n,) rated efforts of the drives [N m | N]
    min_duration_s : shortest time between first and last sample above threshold for an event
    merge_gap_s : runs separated by less than this are one event
    evidence_before_s, evidence_after_s : raw-sample window kept around the event
    max_open_s : an event that may still continue at the end of a batch (above threshold, or below it
        for less than merge_gap_s) is held back for the next batch, but no longer than this
    """

    threshold: Array
    rated_effort: Array
    min_duration_s: float = 0.01
    merge_gap_s: float = 0.05
    evidence_before_s: float = 1.0
    evidence_after_s: float = 1.0
    max_open_s: float = 10.0


def find_runs(t: Array, above: NDArray[np.bool_], merge_gap_s: float) -> tuple[NDArray[np.intp], NDArray[np.intp]]:
    """(starts, ends) inclusive index pairs of runs of ``above``, merging gaps shorter than merge_gap_s."""
    edges = np.diff(np.concatenate(([0], above.astype(np.int8), [0])))
    starts = np.flatnonzero(edges == 1)
    ends = np.flatnonzero(edges == -1) - 1
    if starts.size > 1:
        keep = (t[starts[1:]] - t[ends[:-1]]) >= merge_gap_s  # gap before each later run
        starts = np.concatenate((starts[:1], starts[1:][keep]))
        ends = np.concatenate((ends[:-1][keep], ends[-1:]))
    return starts, ends


def _wrench(J: Array, r: Array) -> tuple[Array, float]:
    """Least-squares w with J^T w = r (virtual work); J (k, n), r (n,)."""
    w: Array = np.asarray(np.linalg.lstsq(J.T, r, rcond=None)[0], dtype=np.float64)  # min |J^T w - r|
    return w, float(np.linalg.norm(J.T @ w - r))


@dataclass(slots=True)
class _Carry:
    """Samples of an event still open at the end of the previous batch."""

    index0: int
    t: Array
    r: Array
    q: Array


@dataclass(frozen=True, slots=True)
class CollisionMonitorState:
    """Everything :class:`CollisionMonitor` needs to resume."""

    observer: ObserverState | None
    n_seen: int
    dt_nominal_s: float
    carry_index0: int | None = None
    carry_t: Array = field(default_factory=lambda: np.zeros(0))
    carry_r: Array = field(default_factory=lambda: np.zeros((0, 0)))
    carry_q: Array = field(default_factory=lambda: np.zeros((0, 0)))


class CollisionMonitor:
    """Momentum observer plus threshold logic, producing :class:`CollisionEvent` records across batches.

    ``jacobian`` maps q (E, n) to J (E, k, n) (e.g. a model's ``platform_jacobian``); it is called on
    the peak samples only. Without it the events carry an empty wrench.
    """

    def __init__(
        self,
        K_O: Array,
        settings: CollisionSettings,
        jacobian: Callable[[Array], Array] | None = None,
    ) -> None:
        self.observer = MomentumObserver(K_O)
        n = self.observer.K_O.shape[0]
        expect_shape("threshold", np.asarray(settings.threshold), (n,))
        expect_shape("rated_effort", np.asarray(settings.rated_effort), (n,))
        if np.any(~(np.asarray(settings.threshold) > 0.0)) or np.any(~(np.asarray(settings.rated_effort) > 0.0)):
            raise ConfigurationError("threshold and rated_effort must be positive")
        self.settings = settings
        self.jacobian = jacobian
        self._n_seen = 0
        self._dt_nominal_s = 0.0
        self._carry: _Carry | None = None

    def update(
        self, t: Array, tau_meas: Array, M: Array, beta: Array, qd: Array, q: Array
    ) -> tuple[Array, list[CollisionEvent]]:
        """Residual (N, n) of this batch and the events that closed in it (q: (N, n) positions)."""
        n = self.observer.K_O.shape[0]
        expect_shape("q", q, (t.shape[0], n))
        r = self.observer.update(t, tau_meas, M, beta, qd)
        if t.shape[0] > 1:
            self._dt_nominal_s = float(np.median(np.diff(t)))  # nominal sample period for evidence indices
        index0 = self._n_seen
        self._n_seen += t.shape[0]
        t_all, r_all, q_all = t, r, q
        if self._carry is not None:  # prepend the samples of the event left open by the last batch
            c, self._carry = self._carry, None
            index0 = c.index0
            t_all, r_all, q_all = (np.concatenate(pair) for pair in ((c.t, t), (c.r, r), (c.q, q)))
        return r, self._events(index0, t_all, r_all, q_all)

    def _events(self, index0: int, t: Array, r: Array, q: Array) -> list[CollisionEvent]:
        s = self.settings
        thr = np.asarray(s.threshold, dtype=np.float64)
        z = np.abs(r) / thr[None, :]  # |r_i| / threshold_i
        starts, ends = find_runs(t, z.max(axis=1) > 1.0, s.merge_gap_s)
        last = t.shape[0] - 1
        open_end = starts.size and t[last] - t[ends[-1]] < s.merge_gap_s  # may still continue or merge
        if open_end and t[last] - t[starts[-1]] < s.max_open_s:
            k = starts[-1]  # hold the samples back for the next batch
            self._carry = _Carry(index0=index0 + int(k), t=t[k:].copy(), r=r[k:].copy(), q=q[k:].copy())
            starts, ends = starts[:-1], ends[:-1]
        keep = (t[ends] - t[starts]) >= s.min_duration_s
        starts, ends = starts[keep], ends[keep]
        if starts.size == 0:
            return []
        peaks = np.array([a + int(np.argmax(z[a : b + 1].max(axis=1))) for a, b in zip(starts, ends, strict=True)])
        J = self.jacobian(q[peaks]) if self.jacobian is not None else None
        dt = self._dt_nominal_s if self._dt_nominal_s > 0.0 else 1.0
        out: list[CollisionEvent] = []
        for e, (a, b) in enumerate(zip(starts, ends, strict=True)):  # loop over events
            seg = r[a : b + 1]
            own = np.argmax(np.abs(seg), axis=0)
            peak_residual = seg[own, np.arange(seg.shape[1])]
            k = int(peaks[e])
            if J is not None:
                w, misfit = _wrench(J[e], r[k])
            else:
                w, misfit = np.zeros(0), 0.0
            out.append(
                CollisionEvent(
                    start_index=index0 + int(a),
                    end_index=index0 + int(b),
                    start_time_s=float(t[a]),
                    end_time_s=float(t[b]),
                    peak_index=index0 + k,
                    peak_time_s=float(t[k]),
                    peak_residual=as_float_array(peak_residual),
                    residual_at_peak=as_float_array(r[k]),
                    q_at_peak=as_float_array(q[k]),
                    external_wrench=as_float_array(w),
                    wrench_misfit=misfit,
                    relative_peak=np.abs(peak_residual) / np.asarray(s.rated_effort, dtype=np.float64),
                    evidence_start_time_s=float(t[a]) - s.evidence_before_s,
                    evidence_end_time_s=float(t[b]) + s.evidence_after_s,
                    evidence_start_index=max(0, index0 + int(a) - int(np.ceil(s.evidence_before_s / dt))),
                    evidence_end_index=index0 + int(b) + int(np.ceil(s.evidence_after_s / dt)),
                )
            )
        return out

    def save(self) -> CollisionMonitorState:
        """The state to persist."""
        c = self._carry
        if c is None:
            return CollisionMonitorState(self.observer.save(), self._n_seen, self._dt_nominal_s)
        return CollisionMonitorState(self.observer.save(), self._n_seen, self._dt_nominal_s, c.index0, c.t, c.r, c.q)

    def restore(self, state: CollisionMonitorState) -> None:
        """Continue from a saved state."""
        self.observer.restore(state.observer)
        self._n_seen = state.n_seen
        self._dt_nominal_s = state.dt_nominal_s
        if state.carry_index0 is None:
            self._carry = None
        else:
            self._carry = _Carry(state.carry_index0, state.carry_t, state.carry_r, state.carry_q)

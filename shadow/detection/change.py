"""Change detection on standardised residual channels: two-sided CUSUM and a GLR for a mean step.

CUSUM (Page, Biometrika 41, 1954; Basseville and Nikiforov, "Detection of Abrupt Changes", 1993, sec. 2.2)
for a signal z standardised to zero mean and unit variance before the change:

    g+_k = max(0, g+_{k-1} + z_k - nu)        rise of the mean
    g-_k = max(0, g-_{k-1} - z_k - nu)        fall of the mean
    alarm when g+_k > h or g-_k > h; both restart from 0 after an alarm

nu is half the smallest change to detect (in standard deviations), h the threshold. The recursion is
Lindley's and has the closed form (used here, vectorised over samples and channels)

    g_k = S_k - min(-g_0, min_{j <= k} S_j),   S_k = sum_{i <= k} (+-z_i - nu)          (1)

The onset estimate is Page's: the sample after the statistic was last zero before the alarm.

Average run length to a false alarm (Siegmund, "Sequential Analysis", 1985, ch. II; Basseville and
Nikiforov 1993, sec. 5.2; section numbers from memory), one-sided, Gaussian, b = h + 1.166 (the
overshoot correction, 2 x 0.583):

    ARL0 ~ (exp(2 nu b) - 2 nu b - 1) / (2 nu^2)                                          (2)

and for the two-sided test 1 / ARL0 = 1 / ARL0+ + 1 / ARL0- (Basseville and Nikiforov 1993, sec. 5.2).

GLR for a step of unknown size at an unknown time in a window of N samples with noise std sigma
(Basseville and Nikiforov 1993, sec. 2.4.3, the case of unknown parameters after and before the change):

    2 ln Lambda(k) = k (N - k) / N (m1_k - m2_k)^2 / sigma^2                              (3)

with m1_k, m2_k the means of samples [0, k) and [k, N); the change time is the maximising k. When sigma is
not given, the profile likelihood 2 ln Lambda(k) = N ln(s0^2 / s_k^2) is used (s0^2 the variance about
one mean, s_k^2 the pooled variance about the two segment means).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray
from scipy.optimize import brentq
from scipy.stats import norm
from scipy.stats import t as student_t

from shadow.detection.events import ChangeAlarm
from shadow.errors import ConfigurationError, ShapeError, expect_finite, expect_shape

Array = NDArray[np.float64]

SIEGMUND_OVERSHOOT = 1.166  # 2 x 0.583, Siegmund (1985) ch. II, for Gaussian increments


def siegmund_arl(nu: float, h: float, *, two_sided: bool = True) -> float:
    """Average run length to a false alarm from Siegmund's approximation (2), in samples."""
    if nu <= 0.0 or h < 0.0:
        raise ConfigurationError(f"nu must be > 0 and h >= 0, got nu={nu!r}, h={h!r}")
    x = 2.0 * nu * (h + SIEGMUND_OVERSHOOT)  # 2 nu b
    one = (np.expm1(x) - x) / (2.0 * nu**2)  # (exp(2 nu b) - 2 nu b - 1) / (2 nu^2)
    return float(one / 2.0) if two_sided else float(one)  # 1/ARL = 1/ARL+ + 1/ARL-, symmetric


def threshold_for_arl(arl0_samples: float, nu: float, *, two_sided: bool = True, h_max: float = 200.0) -> float:
    """Threshold h whose Siegmund ARL0 (2) equals ``arl0_samples`` (brentq on h in [0, h_max])."""
    lo = siegmund_arl(nu, 0.0, two_sided=two_sided)
    if arl0_samples <= lo:
        raise ConfigurationError(f"arl0_samples: {arl0_samples!r} is below the smallest reachable ARL0 {lo:.3g}")
    return float(brentq(lambda h: siegmund_arl(nu, h, two_sided=two_sided) - arl0_samples, 0.0, h_max, xtol=1e-10))


def cusum_statistics(z: Array, g_pos0: Array, g_neg0: Array, nu: float) -> tuple[Array, Array]:
    """Two-sided CUSUM statistics without alarms or resets, by the closed form (1).

    Parameters
    ----------
    z : (N, m) standardised signal, one column per channel
    g_pos0, g_neg0 : (m,) statistics before the first sample, >= 0
    nu : drift (half the change to detect) [standard deviations]

    Returns
    -------
    (g_pos, g_neg), each (N, m).
    """
    S_pos = np.cumsum(z - nu, axis=0)  # S_k for the rise
    S_neg = np.cumsum(-z - nu, axis=0)  # S_k for the fall
    g_pos = S_pos - np.minimum.accumulate(np.minimum(S_pos, -g_pos0[None, :]), axis=0)  # (1)
    g_neg = S_neg - np.minimum.accumulate(np.minimum(S_neg, -g_neg0[None, :]), axis=0)
    return g_pos, g_neg


@dataclass(frozen=True, slots=True)
class CusumState:
    """What :class:`CusumDetector` carries between batches.

    g_pos, g_neg : (m,) statistics after the last sample
    onset_pos_index, onset_neg_index : (m,) global index of the first sample of the current excursion
        (-1: the statistic is zero, the next excursion starts at the next sample)
    onset_pos_time_s, onset_neg_time_s : (m,) their times [s]
    n_seen : samples seen so far
    """

    g_pos: Array
    g_neg: Array
    onset_pos_index: NDArray[np.int64]
    onset_neg_index: NDArray[np.int64]
    onset_pos_time_s: Array
    onset_neg_time_s: Array
    n_seen: int


def _onset(g: Array, k: int, s_time: Array, carried: tuple[int, float], index0: int) -> tuple[int, float]:
    """Page's onset for an alarm at local index k: the sample after the last zero of g[:k+1]."""
    zeros = np.flatnonzero(g[: k + 1] == 0.0)
    if zeros.size:
        j = int(zeros[-1]) + 1
        return index0 + j, float(s_time[j])
    if carried[0] >= 0:
        return carried
    return index0, float(s_time[0])


def cusum_step(
    state: CusumState,
    t: Array,
    z: Array,
    nu: float,
    h: float,
    *,
    lookahead_samples: int = 1024,
) -> tuple[Array, Array, list[ChangeAlarm], CusumState]:
    """Two-sided CUSUM with alarms and restarts over one batch; pure.

    Parameters
    ----------
    state : the previous :class:`CusumState` (see :func:`cusum_initial_state`)
    t : (N,) sample times [s]
    z : (N, m) standardised signal
    nu, h : drift and threshold [standard deviations]
    lookahead_samples : length of the first block searched for the next alarm; the block doubles while
        no alarm is found, so the work is linear in N (a loop over alarms and blocks, not samples)

    Returns
    -------
    g_pos, g_neg : (N, m) statistics (the crossing value at an alarm sample; 0 from the next sample on)
    alarms : the alarms, ordered by channel then time
    state : the state after the last sample
    """
    expect_shape("t", t, (None,))
    n_samples = t.shape[0]
    m = state.g_pos.shape[0]
    expect_shape("z", z, (n_samples, m))
    expect_finite("z", z)
    if nu <= 0.0 or h <= 0.0:
        raise ConfigurationError(f"nu and h must be positive, got nu={nu!r}, h={h!r}")
    g_pos = np.empty((n_samples, m))
    g_neg = np.empty((n_samples, m))
    alarms: list[ChangeAlarm] = []
    new_gp, new_gn = state.g_pos.copy(), state.g_neg.copy()
    new_ip, new_in = state.onset_pos_index.copy(), state.onset_neg_index.copy()
    new_tp, new_tn = state.onset_pos_time_s.copy(), state.onset_neg_time_s.copy()
    index0 = state.n_seen
    for c in range(m):  # loop over channels (actuators), then over alarms and blocks
        gp0, gn0 = float(state.g_pos[c]), float(state.g_neg[c])
        carry_p = (int(state.onset_pos_index[c]), float(state.onset_pos_time_s[c]))
        carry_n = (int(state.onset_neg_index[c]), float(state.onset_neg_time_s[c]))
        s, window = 0, lookahead_samples
        while s < n_samples:
            e = min(n_samples, s + window)
            gp, gn = cusum_statistics(z[s:e, c : c + 1], np.array([gp0]), np.array([gn0]), nu)
            gp, gn = gp[:, 0], gn[:, 0]
            hit = np.flatnonzero((gp > h) | (gn > h))
            if hit.size == 0:
                g_pos[s:e, c], g_neg[s:e, c] = gp, gn
                carry_p = _carry(gp, t[s:e], carry_p, index0 + s)
                carry_n = _carry(gn, t[s:e], carry_n, index0 + s)
                gp0, gn0 = float(gp[-1]), float(gn[-1])
                s, window = e, window * 2
                continue
            k = int(hit[0])
            g_pos[s : s + k + 1, c], g_neg[s : s + k + 1, c] = gp[: k + 1], gn[: k + 1]
            rise = gp[k] >= gn[k]
            g_side = gp if rise else gn
            onset = _onset(g_side, k, t[s:e], carry_p if rise else carry_n, index0 + s)
            alarms.append(
                ChangeAlarm(
                    channel=c,
                    direction=1 if rise else -1,
                    alarm_index=index0 + s + k,
                    alarm_time_s=float(t[s + k]),
                    onset_index=onset[0],
                    onset_time_s=onset[1],
                    statistic=float(g_side[k]),
                )
            )
            gp0 = gn0 = 0.0  # restart both sides after an alarm
            carry_p = carry_n = (-1, 0.0)
            s, window = s + k + 1, lookahead_samples
        new_gp[c], new_gn[c] = gp0, gn0
        new_ip[c], new_tp[c] = carry_p
        new_in[c], new_tn[c] = carry_n
    new = CusumState(new_gp, new_gn, new_ip, new_in, new_tp, new_tn, state.n_seen + n_samples)
    return g_pos, g_neg, alarms, new


def _carry(g: Array, t: Array, carried: tuple[int, float], index0: int) -> tuple[int, float]:
    """Onset of the excursion in progress at the end of a block (-1 if the statistic ended at zero)."""
    if g[-1] == 0.0:
        return (-1, 0.0)
    zeros = np.flatnonzero(g == 0.0)
    if zeros.size:
        j = int(zeros[-1]) + 1
        return (index0 + j, float(t[j]))
    if carried[0] >= 0:
        return carried
    return (index0, float(t[0]))


def cusum_initial_state(n_channels: int) -> CusumState:
    """All statistics at zero, nothing seen."""
    z = np.zeros(n_channels)
    none = np.full(n_channels, -1, dtype=np.int64)
    return CusumState(z, z.copy(), none, none.copy(), z.copy(), z.copy(), 0)


class CusumDetector:
    """Standardises each channel with its baseline mean and std, runs :func:`cusum_step`, keeps the state.

    Parameters
    ----------
    mean, std : (m,) baseline mean and standard deviation of each channel (in the channel's unit)
    nu, h : drift and threshold [standard deviations]; see :func:`threshold_for_arl`
    """

    def __init__(self, mean: Array, std: Array, nu: float, h: float) -> None:
        mean = np.asarray(mean, dtype=np.float64)
        std = np.asarray(std, dtype=np.float64)
        expect_shape("mean", mean, (None,))
        expect_shape("std", std, mean.shape)
        if np.any(~(std > 0.0)):
            raise ConfigurationError(f"std: baseline standard deviations must be positive, got {std.tolist()}")
        if nu <= 0.0 or h <= 0.0:
            raise ConfigurationError(f"nu and h must be positive, got nu={nu!r}, h={h!r}")
        self.mean, self.std, self.nu, self.h = mean, std, nu, h
        self._state = cusum_initial_state(mean.shape[0])

    def update(self, t: Array, y: Array) -> tuple[Array, Array, list[ChangeAlarm]]:
        """Statistics (g_pos, g_neg), each (N, m), and the alarms of this batch; y: (N, m) raw signal."""
        expect_shape("y", y, (t.shape[0], self.mean.shape[0]))
        z = (y - self.mean[None, :]) / self.std[None, :]  # standardise: z = (y - mu_0) / sigma_0
        g_pos, g_neg, alarms, self._state = cusum_step(self._state, t, z, self.nu, self.h)
        return g_pos, g_neg, alarms

    def save(self) -> CusumState:
        """The state to persist."""
        return self._state

    def restore(self, state: CusumState) -> None:
        """Continue from a saved state."""
        if state.g_pos.shape != self.mean.shape:
            raise ShapeError(f"state.g_pos: expected shape {self.mean.shape}, got {state.g_pos.shape}")
        self._state = state


@dataclass(frozen=True, slots=True)
class MeanStep:
    """Result of :func:`glr_mean_step`.

    change_index : first sample after the change (samples [0, k) before, [k, N) after)
    statistic : 2 ln Lambda at the maximum [-]
    mean_before, mean_after : segment means [signal unit]
    interval_before, interval_after : (2,) confidence intervals of the means, conditional on the change time
    sigma : noise std used (given, or the pooled estimate) [signal unit]
    """

    change_index: int
    statistic: float
    mean_before: float
    mean_after: float
    interval_before: Array
    interval_after: Array
    sigma: float

    @property
    def step(self) -> float:
        """Estimated size of the step, mean_after - mean_before."""
        return self.mean_after - self.mean_before


def glr_statistic(x: Array, sigma: float | None = None, *, min_segment: int = 2) -> Array:
    """2 ln Lambda(k) of (3) for every split k (N,); -inf where a segment is shorter than min_segment."""
    expect_shape("x", x, (None,))
    expect_finite("x", x)
    n = x.shape[0]
    if min_segment < 1 or n < 2 * min_segment:
        raise ShapeError(f"x: need at least {2 * min_segment} samples for segments of {min_segment}, got {n}")
    k = np.arange(n, dtype=np.float64)
    xc = x - x.mean()  # centring keeps the cumulative sums well conditioned
    c1 = np.concatenate(([0.0], np.cumsum(xc)[:-1]))  # sum of [0, k)
    with np.errstate(divide="ignore", invalid="ignore"):
        m1 = c1 / k  # mean of [0, k)
        m2 = -c1 / (n - k)  # mean of [k, N) (the centred total is 0)
        between = k * (n - k) / n * (m1 - m2) ** 2  # k (N - k) / N (m1 - m2)^2
        if sigma is not None:
            if sigma <= 0.0:
                raise ConfigurationError(f"sigma: must be positive, got {sigma!r}")
            stat = between / sigma**2  # (3), known sigma
        else:
            total = float(xc @ xc)  # N s0^2
            stat = n * np.log(total / (total - between))  # N ln(s0^2 / s_k^2), profile likelihood
    ok = (k >= min_segment) & (n - k >= min_segment)
    return np.where(ok, stat, -np.inf)


def glr_mean_step(x: Array, sigma: float | None = None, *, confidence: float = 0.95, min_segment: int = 2) -> MeanStep:
    """Most likely mean step in a window x (N,): change time, statistic and the means with intervals.

    The intervals are ``mean +- q s / sqrt(n_seg)`` with q the normal quantile (sigma given) or Student's t
    with N - 2 degrees of freedom (sigma pooled); they treat the change time as known.
    """
    if not 0.0 < confidence < 1.0:
        raise ConfigurationError(f"confidence: must lie in (0, 1), got {confidence!r}")
    stat = glr_statistic(x, sigma, min_segment=min_segment)
    k = int(np.argmax(stat))
    n = x.shape[0]
    before, after = x[:k], x[k:]
    m1, m2 = float(before.mean()), float(after.mean())
    if sigma is None:
        ss = float(((before - m1) ** 2).sum() + ((after - m2) ** 2).sum())
        s = np.sqrt(ss / (n - 2))  # pooled residual std
        q = float(student_t.ppf(0.5 + confidence / 2.0, n - 2))
    else:
        s = sigma
        q = float(norm.ppf(0.5 + confidence / 2.0))
    half1, half2 = q * s / np.sqrt(k), q * s / np.sqrt(n - k)
    return MeanStep(
        change_index=k,
        statistic=float(stat[k]),
        mean_before=m1,
        mean_after=m2,
        interval_before=np.array([m1 - half1, m1 + half1]),
        interval_after=np.array([m2 - half2, m2 + half2]),
        sigma=float(s),
    )


# ------------------------------------------------------------------------------------------ mass steps
@dataclass(frozen=True, slots=True)
class MassStepSettings:
    """How :class:`MassStepWatch` follows a mass measured once per stretch (a transfer, an empty move).

    learn_count : stretches that set the reference (median) and the spread (1.4826 MAD) before watching
    min_step_kg : the smallest step worth an event; the CUSUM drift is nu = min_step / (2 spread) in [0.5, 2.5]
    spread_floor_kg : lower bound of the spread (identical stretches would otherwise give 0)
    arl_stretches : mean number of stretches between false alarms on an unchanged mass (Siegmund, eq. 2); a
        delta picking every 0.9 s weighs about 10^5 transfers (and as many empty moves) a day, so 10^7 is one
        false step in about 100 days per watch (10^5 was one a day: seen as a 14 g "step" of five light pieces
        in 24 simulated hours of production, ``python -m benchmarks.false_alarms``)
    confirm_count : stretches after the alarm's onset weighed before the step is reported (ten: five light
        pieces in a row are an excursion the GLR must be able to see end)
    history : stretches kept for the GLR estimate of the masses before and after a step
    """

    learn_count: int = 20
    min_step_kg: float = 0.02
    spread_floor_kg: float = 1e-3
    arl_stretches: float = 1e7
    history: int = 200
    confirm_count: int = 10

    def __post_init__(self) -> None:
        if self.learn_count < 5 or self.history < 2 * self.learn_count:
            raise ConfigurationError("mass steps: learn_count >= 5 and history >= 2 learn_count are needed")
        if not (self.min_step_kg > 0.0 and self.spread_floor_kg > 0.0 and self.arl_stretches > 1.0):
            raise ConfigurationError("mass steps: min_step_kg, spread_floor_kg > 0 and arl_stretches > 1 are needed")


@dataclass(frozen=True, slots=True)
class MassStep:
    """A sustained step of a mass: when it began, its size before and after with 95 % intervals [kg]."""

    onset_time_s: float  # start of the first stretch after the change (Page's onset, refined by the GLR)
    alarm_time_s: float  # end of the stretch at which the CUSUM crossed its threshold
    mass_before_kg: float
    mass_after_kg: float
    interval_before_kg: tuple[float, float]
    interval_after_kg: tuple[float, float]
    stretches_before: int
    stretches_after: int

    @property
    def step_kg(self) -> float:
        return self.mass_after_kg - self.mass_before_kg


class MassStepWatch:
    """A two-sided CUSUM on one mass estimated per stretch, with the GLR's before/after masses at an alarm.

    The first ``learn_count`` stretches give the reference ``m_0`` (their median) and the spread ``s``
    (1.4826 times their median absolute deviation: consistent for Gaussian data and deaf to a few odd
    stretches). Then each stretch adds ``z = (m - m_0) / sqrt(s^2 + sigma_m^2)`` (sigma_m: the stretch's own
    standard error) to :func:`cusum_step`. After an alarm it waits for ``confirm_count`` stretches past the
    onset; then :func:`glr_mean_step` on the stretches since the last reset places the change and gives the
    masses before and after. A step smaller than half ``min_step_kg`` was an excursion and is dropped;
    otherwise the watch takes the mass after as its new reference (keeping the spread) and watches on from
    the stretches after the change.
    """

    def __init__(self, settings: MassStepSettings) -> None:
        self.settings = settings
        self._start_learning()

    def _start_learning(self) -> None:
        self.reference_kg = float("nan")
        self.spread_kg = float("nan")
        self.h = float("nan")  # set with the spread, at the end of learning
        self._rows = np.zeros((0, 4))  # t_start, t_end, m, sigma_m per stretch since the last reset
        self._cusum = cusum_initial_state(1)
        self._alarm_onset_s = float("nan")  # an alarm waiting for confirmation: its onset time [s]

    @property
    def learning(self) -> bool:
        return not np.isfinite(self.reference_kg)

    def _nu_for(self, spread_kg: float) -> float:
        """nu = min_step / (2 s), kept in [0.5, 2.5]: a step below one spread is not told apart from the scatter,
        and above 2.5 the threshold for the run length would fall to zero (the statistic never builds up)."""
        return min(max(self.settings.min_step_kg / (2.0 * spread_kg), 0.5), 2.5)

    def push(self, t_start_s: float, t_end_s: float, mass_kg: float, std_kg: float) -> MassStep | None:
        """Add one stretch's mass; returns the step once an alarm is confirmed by ``confirm_count`` stretches."""
        s = self.settings
        self._rows = np.concatenate([self._rows, [[t_start_s, t_end_s, mass_kg, std_kg]]])[-s.history :]
        if self.learning:
            if self._rows.shape[0] >= s.learn_count:
                m = self._rows[:, 2]
                self.reference_kg = float(np.median(m))
                self.spread_kg = max(1.4826 * float(np.median(np.abs(m - self.reference_kg))), s.spread_floor_kg)
                self.h = threshold_for_arl(s.arl_stretches, self._nu_for(self.spread_kg), h_max=50.0)
                self._rows = self._rows[:0]
            return None
        if np.isnan(self._alarm_onset_s):
            z = (mass_kg - self.reference_kg) / np.hypot(self.spread_kg, std_kg)
            nu = self._nu_for(self.spread_kg)
            _, _, alarms, self._cusum = cusum_step(self._cusum, np.array([t_end_s]), np.array([[z]]), nu, self.h)
            if not alarms:
                return None
            self._alarm_onset_s = alarms[0].onset_time_s  # Page's onset: the end time of its first stretch
        rows = self._rows
        if int(np.sum(rows[:, 1] >= self._alarm_onset_s)) < s.confirm_count:
            return None  # wait for enough stretches after the onset to weigh the new mass
        # GLR over the kept stretches, two pseudo-stretches of the learned reference first, known spread
        x = np.concatenate([np.full(2, self.reference_kg), rows[:, 2]])
        glr = glr_mean_step(x, self.spread_kg, min_segment=2)
        k0 = min(max(glr.change_index - 2, 0), rows.shape[0] - 1)
        before, after = rows[:k0, 2], rows[k0:, 2]
        self._alarm_onset_s = float("nan")
        self._cusum = cusum_initial_state(1)
        m_after = float(np.mean(after))
        m_before = float(np.mean(before)) if before.size else self.reference_kg
        if abs(m_after - m_before) < 0.5 * s.min_step_kg:
            return None  # an excursion, not a step: the mass is back where it was
        half_after = 1.96 * self.spread_kg / np.sqrt(after.size)  # mean +- z s / sqrt(n), s the learned spread
        half_before = 1.96 * self.spread_kg / np.sqrt(max(before.size, s.learn_count))
        self.reference_kg = m_after
        self._rows = rows[k0:]
        return MassStep(
            onset_time_s=float(rows[k0, 0]),
            alarm_time_s=float(t_end_s),
            mass_before_kg=m_before,
            mass_after_kg=m_after,
            interval_before_kg=(m_before - half_before, m_before + half_before),
            interval_after_kg=(m_after - half_after, m_after + half_after),
            stretches_before=int(before.size),
            stretches_after=int(after.size),
        )

    @property
    def alarmed(self) -> bool:
        """True while an alarm waits for its confirming stretches."""
        return not np.isnan(self._alarm_onset_s)

    def forget_since(self, t_s: float) -> None:
        """Drop the stretches that started at or after ``t_s`` and restart the statistic (their masses were
        weighed against something that has since been found to have changed)."""
        self._rows = self._rows[self._rows[:, 0] < t_s]
        self._cusum = cusum_initial_state(1)
        self._alarm_onset_s = float("nan")

    def save(self, prefix: str) -> dict[str, Array]:
        c = self._cusum
        return {
            f"{prefix}reference_kg": np.array(self.reference_kg),
            f"{prefix}spread_kg": np.array(self.spread_kg),
            f"{prefix}h": np.array(self.h),
            f"{prefix}alarm_onset_s": np.array(self._alarm_onset_s),
            f"{prefix}rows": self._rows.copy(),
            f"{prefix}cusum": np.array(
                [
                    c.g_pos[0],
                    c.g_neg[0],
                    c.onset_pos_index[0],
                    c.onset_neg_index[0],
                    c.onset_pos_time_s[0],
                    c.onset_neg_time_s[0],
                    c.n_seen,
                ]
            ),  # fmt: skip
        }

    def restore(self, state: dict[str, Array], prefix: str) -> None:
        """Continue from :meth:`save`; a state without these keys (an older checkpoint) starts learning afresh."""
        if f"{prefix}rows" not in state:
            self._start_learning()
            return
        self.reference_kg = float(state[f"{prefix}reference_kg"])
        self.spread_kg = float(state[f"{prefix}spread_kg"])
        self.h = float(state[f"{prefix}h"])
        self._alarm_onset_s = float(state[f"{prefix}alarm_onset_s"])
        self._rows = np.asarray(state[f"{prefix}rows"], dtype=float).reshape(-1, 4).copy()
        g = np.asarray(state[f"{prefix}cusum"], dtype=float)
        self._cusum = CusumState(
            g[0:1].copy(), g[1:2].copy(), g[2:3].astype(np.int64), g[3:4].astype(np.int64), g[4:5].copy(),
            g[5:6].copy(), int(g[6]),
        )  # fmt: skip

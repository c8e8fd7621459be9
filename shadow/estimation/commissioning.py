"""Commissioning: batch identification of friction, offsets, payload and noise from one recorded healthy run.

Offline, the whole run is at hand, so the Savitzky-Golay derivatives are taken on windows centred on each sample
(non-causal: the m samples after a sample are used as well as the m before; the first and last m samples of each
segment get no derivative and are dropped). The estimate is the starting point (:class:`Baseline`) of the live
tracker in :mod:`shadow.estimation.tracker`, which uses the same measurement model.

Measurement model (sample k, actuator i; efforts at the joint side)
-------------------------------------------------------------------
    z_k = tau_meas_k - tau_known(m_k) = H(m_k) theta + v_k,    v_k,i ~ N(0, sigma_i^2)

with m_k,i the motion at the instant actuator i's reported effort belongs to, ``t_k - d_i`` (as in the tracker:
:func:`shadow.robots.drives.reported_effort_delay_s`, from the settings' current-loop bandwidths, ``reported_effort``
and ``command_period_s``; the centred window's polynomial is evaluated there) and
- delta (the model's payload is one mass): H = [Y_p, Y_p g_k, Y_f], theta = [m_tool, m_work, theta_f], g_k = 1 while
  the tool grips;
- hexapod (p = 10): H = [Y_p, Y_f], theta = [pi (10 standard inertial parameters), theta_f]; if the run cannot
  excite the nine first and second moments, only the mass is estimated ("mass only"), the other nine are held at
  their nominal values and moved to the known side: z = tau_meas - tau_known - Y_p[:, :, 1:] pi_nom[1:].

Weighted least squares (Montgomery, Peck & Vining, "Introduction to Linear Regression Analysis", 5th ed., 2012,
section 5.5, weighted least squares; section 3.4, confidence intervals on the coefficients; from memory)
----------------------------------------------------------------------------------------------------
    A = W H (rows of all samples stacked, (N n, p)), b = W z,  W = diag(1 / sigma_i)
    theta = argmin |A theta - b|^2 subject to lower <= theta   (Coulomb, viscous, masses >= 0)
    s^2 = |b - A theta|^2 / (N n - p),   Cov(theta) = s^2 (A^T A)^-1
    theta_j +- t_{1 - alpha/2, N n - p} sqrt(Cov_jj)                         (Student t)
The weights start equal (sigma_i = 1); the per-actuator residual std sigma_i^2 = sum_k r_k,i^2 / (N - p / n) sets the
weights for one more solve (iteratively reweighted least squares, one iteration by default). The unconstrained
solution is ``scipy.linalg.lstsq``; only if it breaks a bound is the problem solved again with
``scipy.optimize.lsq_linear`` (bounded-variable least squares). The covariance is that of the unconstrained problem;
a parameter held at its bound is flagged.

Excitation (Gautier & Khalil, "Exciting trajectories for the identification of base inertial parameters of robots",
Int. J. Robotics Research 11(4), 1992, use the condition number of the regressor; title from memory)
---------------------------------------------------------------------------------------------------
    A D, D = diag(1 / |A_:,j|) (column scaling, so the units of the parameters drop out)
    A D = U S V^T,  kappa = s_max / s_min
A singular value below s_max / max_condition means the run did not see the direction v_j of (scaled) parameter
space: the parameters with a large share |v_ij| > involvement in it are reported, in words. Independently of the
singular values, the motion of each actuator is checked: one that never exceeded ``reversal_speed`` leaves its
Coulomb and viscous friction unseen; one that moved at speed in one direction only leaves its Coulomb friction not
separable from its offset. A column with (numerically) no effect at all, |A_:,j| <= empty_column_rtol max_i |A_:,i|,
is unseen too (column scaling would otherwise blow its rounding dust up to full size).
Each finding names the parameters to hold at 0 in a second solve without them: an unmoving actuator's Coulomb and
viscous friction; a one-way actuator's Coulomb friction (its offset then carries F_c + o); the work-piece mass
without gripping (or with gripping throughout: the tool mass then carries both); empty columns; for a weak direction
of the singular value decomposition, its largest member. Held parameters get no interval; the baseline starts them
from nominal values with a wide prior (:func:`baseline_from_identification`).

Drive-gain calibration with a known added mass (after Gautier & Briot, "Global identification of joint drive
gains and dynamic parameters of parallel robots", IROS 2011; title and idea from memory)
--------------------------------------------------------------------------------------------------------------
Two runs of the same motion family, B with a known test body (parameters pi_t) added. The effort computed with the
nominal current-to-effort gain is tau_nom,i = beta_i tau_true,i, with beta_i = 1 / gamma_i and gamma_i the relative
gain error. Per actuator i, over the samples of both runs (b_k = 1 in run B):
    tau_nom,k,i = beta_i (Y_p,k,i pi_t b_k) + c_i tau_known,k,i + Y_pay,k,i phi_i + Y_f,k,i psi_i + v_k,i
with phi_i = beta_i theta_p and psi_i = beta_i theta_f,i free per actuator, and c_i a free scale of the model's own
rigid efforts (so the arm and platform parameters of the description need not be exact: only the test mass sets the
scale, the point of the added-mass method). The measured value is alone on the left, so ordinary least squares is
unbiased here (the published method writes the current into the regressor and therefore needs total least squares).
gamma_i = 1 / beta_i; its interval is the image of beta_i's interval (1/x is monotone for x > 0).

Viscous temperature coefficient (lubricant viscosity falls with temperature; Reynolds' exponential law,
O. Reynolds, Phil. Trans. R. Soc. 177, 1886, from memory)
-----------------------------------------------------------------------------------------------------
When the run carries drive temperatures T_k,i [K], the viscous term of actuator i becomes
    F_v,i(T) qd = b_i exp(-k_i (T - T_ref,i)) qd,      T_ref,i = sum_k qd_k,i^2 T_k,i / sum_k qd_k,i^2
(T_ref,i is the temperature the viscous column's information is centred on, so b_i is nearly uncorrelated with
k_i, and the plain fit's F_v,i equals b_i to first order). The model is linear in all parameters but k_i; it is
solved by Gauss-Newton on the same weighted least squares (e.g. Bjorck, "Numerical Methods for Least Squares
Problems", SIAM 1996, sec. 9.2, from memory): at the current k^(m), with e_k,i = exp(-k_i^(m) dT_k,i),
    z = H' theta + sum_i g_i c_i + v,   H' = H with the viscous column of i times e_k,i,
    g_i = -dT_k,i e_k,i qd_k,i (row i only),   k_i^(m+1) = k_i^(m) + c_i / b_i
(first order in the step: b exp(-(k + d) dT) = b e (1 - d dT), c = b d), repeated until |c_i / b_i| < tol.
Weights are the main fit's 1 / sigma_i, and only entries with |qd_k,i| >= ``temperature_min_speed`` (default
20 v_s) take part for the actuators fitted: a Stribeck hump the model does not carry biases the viscous column
by a constant, which the logarithmic law would turn into a wrong k (on the project's simulator +9 to +29 %
with every sample, -2 to 0 % with the fast ones).
At convergence c_i = 0, so Var(k_i) = Var(c_i) / b_i^2 (delta method), interval k_i +- t std. Only actuators
whose viscous friction the main fit saw, whose temperature spanned at least ``min_temperature_span_k`` and
whose interval half-width is below ``max_temperature_halfwidth_per_k`` count as identified; the others are
named with the reason in words. The intervals, like the others, assume white residuals (an unmodelled effect
that follows the motion makes them too narrow).

Public API
----------
condition_run, fit_sample_clock              centred Savitzky-Golay conditioning; stamps onto a fitted fixed-rate clock
identify_run -> Identification               payload, friction, noise, intervals, excitation report
identify_stribeck_velocity -> StribeckSearch the Stribeck velocity a run supports (profiled likelihood), or none
weighted_least_squares, scaled_singular_values   the solver and the excitation measure
identify_viscous_temperature -> ViscousTemperatureFit   k_v per actuator from the run's drive temperatures
baseline_from_identification, unseen_prior_std   the live tracker's Baseline
calibrate_gains -> GainCalibration           drive gains with a known added mass

Symbols
-------
t (N,) [s]; q, qd, qdd (N, n); tau, z (N, n) [N m | N]; Y_p (N, n, p_m); Y_f (N, n, k n); H (N, n, p)
theta (p,); sigma (n,) [N m | N]; kappa [-]; beta, gamma (n,) [-]
T (N, n) drive temperatures [K]; T_ref (n,) [K]; k_v (n,) viscous temperature coefficient [1/K]
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass

import numpy as np
import scipy.linalg
import scipy.optimize
import scipy.stats
from numpy.typing import NDArray

from shadow.errors import ConfigurationError, ShadowError, ShapeError, expect_finite, expect_shape
from shadow.estimation.baseline import Baseline
from shadow.estimation.conditioning import Conditioner, EffortMotion, regressor_at_efforts
from shadow.estimation.tracker import HEXAPOD_PAYLOAD_NAMES
from shadow.robots.drives import reported_effort_delay_s
from shadow.robots.friction import friction_regressor, parameter_names, parameters_per_actuator
from shadow.robots.mechanism import Mechanism
from shadow.robots.parameters import ReportedEffort

Array = NDArray[np.float64]
BoolArray = NDArray[np.bool_]

DELTA_PAYLOAD_NAMES = ("tool_mass", "work_piece_mass")
PAYLOAD_FULL = "full"  # all p payload parameters of the model
PAYLOAD_MASS = "mass only"  # hexapod: the mass, the other nine held at nominal
PAYLOAD_SPLIT = "tool and work piece"  # delta: tool mass and work-piece mass


class InsufficientDataError(ShadowError, ValueError):
    """The run has too few usable samples for the number of parameters."""


@dataclass(frozen=True, slots=True)
class CommissioningSettings:
    """Knobs of the batch identification, SI units.

    smooth_velocity : v_s of the friction model's smooth sign [rad/s | m/s]
    half_window, poly_order, max_gap_s : Savitzky-Golay conditioning (window 2 m + 1 samples, centred); the default
        quintic keeps the acceleration's bias on a 1 kHz pick-and-place motion far below what a long run resolves
        (a cubic on 21 samples biased the payload mass by several of its standard deviations in our tests)
    stribeck_velocity : v_st [rad/s | m/s], or None for no Stribeck term
    current_loop_bandwidth_hz : (n,) per actuator [Hz], or None for ideal loops
    reported_effort : n :class:`ReportedEffort` values, what each recorded effort is; None: all actual
    command_period_s : (n,) hold period of each effort command [s] (the controller's cycle); None: continuous
        (the last three set each effort's instant, :meth:`effort_delay_s`)
    confidence : level of the intervals, in (0, 1)
    max_condition : largest accepted ratio s_max / s_j of the column-scaled regressor [-]
    involvement : share |v_ij| above which parameter i is named for an unseen direction j [-]
    reversal_speed : speed counted as "moving" [rad/s | m/s]; None: 5 v_s (tanh(5) = 0.9999)
    min_motion_fraction : share of the samples an actuator must spend moving in each direction [-]
    weight_iterations : reweighting passes after the first, equally weighted solve
    min_samples_per_parameter : usable samples (each with n efforts) per estimated parameter, at least
    empty_column_rtol : a weighted regressor column shorter than this share of the longest one counts as empty
        (column scaling alone would blow numerical dust up to full size) [-]
    velocity_unit : label of the actuator speed unit in the explanations ("rad/s" or "m/s")
    min_temperature_span_k : smallest range of an actuator's drive temperature over the run for its viscous
        temperature coefficient to count as seen [K]
    max_temperature_halfwidth_per_k : largest half-width of that coefficient's interval to count as seen [1/K]
    temperature_iterations, temperature_tol_per_k : Gauss-Newton cap and step tolerance of the coefficient [1/K]
    temperature_min_speed : the coefficient is fitted on samples faster than this only [rad/s | m/s]; None: 20 v_s
        (the viscous branch of the friction curve, clear of a Stribeck hump the model does not carry)
    work_piece_per_kg : w (p,) of a work piece the tool grips on a model with p > 1 payload parameters (the
        hexapod's part clamped into its fixture: its standard parameters per kg), or None for none. With it the
        payload while gripping is the fixture's plus ``m_work w``, and ``work_piece_mass`` is fitted beside the
        fixture's parameters (the delta's work piece needs no w: its payload is one mass)
    """

    smooth_velocity: float
    half_window: int = 10
    poly_order: int = 5
    max_gap_s: float = 0.05
    stribeck_velocity: float | None = None
    current_loop_bandwidth_hz: Array | None = None
    confidence: float = 0.95
    max_condition: float = 200.0
    involvement: float = 0.3
    reversal_speed: float | None = None
    min_motion_fraction: float = 0.02
    weight_iterations: int = 1
    min_samples_per_parameter: int = 10
    empty_column_rtol: float = 1e-6
    velocity_unit: str = "rad/s"
    reported_effort: tuple[ReportedEffort, ...] | None = None
    command_period_s: Array | None = None
    min_temperature_span_k: float = 5.0
    max_temperature_halfwidth_per_k: float = 0.01
    temperature_iterations: int = 20
    temperature_tol_per_k: float = 1e-7
    temperature_min_speed: float | None = None
    work_piece_per_kg: Array | None = None

    def __post_init__(self) -> None:
        if self.work_piece_per_kg is not None:
            w = np.asarray(self.work_piece_per_kg, dtype=float)
            if w.ndim != 1 or not np.all(np.isfinite(w)) or not w[0] > 0:
                raise ConfigurationError(
                    f"work_piece_per_kg: expected finite numbers, the first (mass per kg) > 0; got {w}"
                )
        if not self.min_temperature_span_k > 0:
            raise ConfigurationError(f"min_temperature_span_k: must be > 0, got {self.min_temperature_span_k}")
        if not self.max_temperature_halfwidth_per_k > 0:
            raise ConfigurationError(
                f"max_temperature_halfwidth_per_k: must be > 0, got {self.max_temperature_halfwidth_per_k}"
            )
        if self.temperature_iterations < 1 or not self.temperature_tol_per_k > 0:
            raise ConfigurationError("temperature_iterations, temperature_tol_per_k: must be >= 1 and > 0")
        if not self.smooth_velocity > 0:
            raise ConfigurationError(f"smooth_velocity: must be > 0, got {self.smooth_velocity}")
        if not 0.0 < self.confidence < 1.0:
            raise ConfigurationError(f"confidence: must lie in (0, 1), got {self.confidence}")
        if not self.max_condition > 1.0:
            raise ConfigurationError(f"max_condition: must be > 1, got {self.max_condition}")
        if not 0.0 < self.involvement < 1.0:
            raise ConfigurationError(f"involvement: must lie in (0, 1), got {self.involvement}")
        if self.weight_iterations < 0:
            raise ConfigurationError(f"weight_iterations: must be >= 0, got {self.weight_iterations}")
        if self.reversal_speed is not None and not self.reversal_speed > 0:
            raise ConfigurationError(f"reversal_speed: must be > 0, got {self.reversal_speed}")

    def effort_delay_s(self, n_actuators: int) -> Array:
        """d (n,) [s]: the effort recorded at t_k belongs to the motion at t_k - d."""
        reported = self.reported_effort or (ReportedEffort.ACTUAL,) * n_actuators
        if len(reported) != n_actuators:
            raise ConfigurationError(f"reported_effort: expected {n_actuators} values, got {len(reported)}")
        return reported_effort_delay_s(reported, self.current_loop_bandwidth_hz, self.command_period_s)

    @property
    def temperature_speed(self) -> float:
        """Speed above which samples enter the viscous temperature fit [rad/s | m/s]."""
        return 20.0 * self.smooth_velocity if self.temperature_min_speed is None else float(self.temperature_min_speed)

    @property
    def moving_speed(self) -> float:
        """Speed above which an actuator counts as moving [rad/s | m/s]."""
        return 5.0 * self.smooth_velocity if self.reversal_speed is None else float(self.reversal_speed)

    @property
    def friction_per_actuator(self) -> int:
        """k: 3, or 4 with the Stribeck term."""
        return parameters_per_actuator(stribeck=self.stribeck_velocity is not None)


@dataclass(frozen=True, slots=True)
class ConditionedRun:
    """A run after centred Savitzky-Golay differentiation; all fields at the same K samples."""

    t: Array  # (K,) [s]
    q: Array  # (K, n)
    qd: Array  # (K, n)
    qdd: Array  # (K, n)
    effort: Array  # (K, n) [N m | N]
    gripping: Array  # (K,) 1.0 while gripping, else 0.0
    segment_start: BoolArray  # (K,)
    n_raw: int  # samples before conditioning
    n_segments: int  # stretches between gaps
    effort_motion: EffortMotion | None = None  # the motion at the efforts' instants; None: the samples themselves
    temperature: Array | None = None  # (K, n) drive temperatures [K], NaN where not recorded; None: none recorded

    @property
    def n_samples(self) -> int:
        return int(self.t.shape[0])

    def motion_at_efforts(self) -> EffortMotion:
        """:attr:`effort_motion`, or the samples themselves (one group of delay 0) when the run has none."""
        if self.effort_motion is not None:
            return self.effort_motion
        n = self.q.shape[1]
        return EffortMotion(np.zeros(1), np.zeros(n, dtype=np.intp), self.q[None], self.qd[None], self.qdd[None])


@dataclass(frozen=True, slots=True)
class LeastSquaresSolution:
    """Solution of one (pre-weighted) linear least-squares problem."""

    theta: Array  # (p,)
    residual: Array  # (N, n) weighted residual b - A theta, in units of sigma
    at_bound: BoolArray  # (p,) held at its lower bound


@dataclass(frozen=True, slots=True)
class ActuatorMotion:
    """How much actuator ``index`` (0-based) moved in each direction during the run."""

    index: int
    positive_fraction: float  # share of samples with qd > moving speed
    negative_fraction: float  # share with qd < -moving speed
    peak_speed: float  # max |qd| [rad/s | m/s]

    def moved(self, min_fraction: float) -> bool:
        return self.positive_fraction + self.negative_fraction >= min_fraction

    def reversed(self, min_fraction: float) -> bool:
        return self.positive_fraction >= min_fraction and self.negative_fraction >= min_fraction


@dataclass(frozen=True, slots=True)
class UnseenDirection:
    """A combination of parameters the run could not separate, and why, in words."""

    parameters: tuple[str, ...]
    explanation: str
    singular_value_ratio: float  # s_j / s_max; 0 for a motion-based finding
    held: tuple[str, ...]  # the ones left out of the final fit (held at 0); the others absorb their effect


@dataclass(frozen=True, slots=True)
class Identification:
    """Estimate, intervals, noise and excitation report of one run."""

    parameter_names: tuple[str, ...]
    theta: Array  # (p,)
    covariance: Array  # (p, p); zero rows and columns for held parameters
    ci_low: Array  # (p,), NaN for a held parameter
    ci_high: Array  # (p,)
    identified: BoolArray  # (p,) False where the run could not see the parameter (alone)
    held: BoolArray  # (p,) left out of the final fit and held at 0 (a subset of ~identified)
    at_bound: BoolArray  # (p,)
    noise_std: Array  # (n,) [N m | N]
    residual: Array  # (K, n) z - H theta [N m | N]
    dof: int  # N n - p
    confidence: float
    condition_number: float  # kappa of the column-scaled, weighted regressor, every parameter in
    fitted_condition_number: float  # kappa of the same, the held parameters' columns left out (the final fit's)
    singular_values: Array  # (p,) of the column-scaled regressor, descending
    unseen: tuple[UnseenDirection, ...]
    motion: tuple[ActuatorMotion, ...]
    payload_mode: str  # PAYLOAD_SPLIT, PAYLOAD_FULL or PAYLOAD_MASS
    payload_parameters: Array | None  # (p_m,) the model's theta_p for the hexapod (mass only: nominal rest)
    n_payload: int  # leading entries of theta that are payload parameters
    n_samples: int
    gripping_fraction: float

    @property
    def std(self) -> Array:
        return np.sqrt(np.diag(self.covariance))


@dataclass(frozen=True, slots=True)
class GainCalibration:
    """Relative drive gains gamma_i (true effort per effort computed with the nominal gain) and intervals."""

    gain: Array  # (n,) gamma [-]
    ci_low: Array  # (n,)
    ci_high: Array  # (n,)
    beta: Array  # (n,) 1 / gamma
    beta_std: Array  # (n,)
    model_scale: Array  # (n,) c_i, the fitted scale of the model's own rigid efforts (nan if trusted)
    noise_std: Array  # (n,) [N m | N]
    dof: int  # per actuator
    confidence: float


# ------------------------------------------------------------------------------------------ conditioning


def condition_run(
    t: Array,
    q: Array,
    effort: Array,
    gripping: BoolArray | None,
    settings: CommissioningSettings,
    *,
    temperature: Array | None = None,
) -> ConditionedRun:
    """Centred Savitzky-Golay velocities and accelerations of a whole run; effort, tool state, temperatures aligned.

    The motion is also evaluated at the instants the efforts belong to (``settings.effort_delay_s``).

    Parameters
    ----------
    t : (N,) [s], strictly increasing (a longer step than ``max_gap_s`` splits the run)
    q : (N, n) [rad | m];  effort : (N, n) [N m | N];  gripping : (N,) bool or None (never gripping)
    temperature : (N, n) drive temperatures [K] (NaN where not recorded), or None
    """
    t = np.asarray(t, dtype=float)
    expect_shape("t", t, (None,))
    q = np.asarray(q, dtype=float)
    expect_shape("q", q, (t.shape[0], None))
    effort = np.asarray(effort, dtype=float)
    expect_shape("effort", effort, q.shape)
    expect_finite("effort", effort)
    grip = np.zeros(t.shape[0]) if gripping is None else np.asarray(gripping, dtype=bool).astype(float)
    expect_shape("gripping", grip, t.shape)
    channels = {"effort": effort, "gripping": grip[:, None]}
    if temperature is not None:
        temp = np.asarray(temperature, dtype=float)
        expect_shape("temperature", temp, q.shape)
        if np.any(np.isinf(temp)):
            raise ConfigurationError("temperature: holds an infinite value")
        channels["temperature"] = temp
    cond = Conditioner(
        q.shape[1],
        {name: a.shape[1] for name, a in channels.items()},
        half_window=settings.half_window,
        poly_order=settings.poly_order,
        max_gap_s=settings.max_gap_s,
        effort_delay_s=settings.effort_delay_s(q.shape[1]),
    )
    cb = cond.feed(t, q, channels)  # whole run at once: centred windows
    return ConditionedRun(
        t=cb.t,
        q=cb.q,
        qd=cb.qd,
        qdd=cb.qdd,
        effort=cb.channels["effort"],
        gripping=cb.channels["gripping"][:, 0],
        segment_start=cb.segment_start,
        n_raw=int(t.shape[0]),
        n_segments=1 + len(cb.restarts),
        effort_motion=cb.effort_motion,
        temperature=cb.channels["temperature"] if temperature is not None else None,
    )


def fit_sample_clock(t: Array, *, max_step_ratio: float = 1.5) -> Array:
    """Time stamps moved onto the straight line of a fixed-rate clock, fitted per stretch by least squares.

    For a controller that samples on a fixed clock but stamps each sample with a jitter e_k (the values belong to
    the instants a + b k, the stamps are a + b k + e_k): within each stretch the line ``t_k = a + b k`` is fitted to
    the stamps (ordinary least squares in k, so zero-mean jitter averages out). A step longer than
    ``max_step_ratio`` times the median step (a missed sample, a pause) starts a new stretch. Polynomial
    differentiation on jittered stamps turns the jitter into velocity and acceleration errors of order
    qd e / dt and qd e / dt^2; on the fitted clock they vanish when the jitter is only in the stamps.

    Parameters
    ----------
    t : (N,) stamps [s], strictly increasing
    max_step_ratio : a step above this multiple of the median step breaks the stretch [-], > 1

    Returns
    -------
    (N,) fitted times [s]
    """
    t = np.asarray(t, dtype=float)
    expect_shape("t", t, (None,))
    expect_finite("t", t)
    if not max_step_ratio > 1.0:
        raise ConfigurationError(f"max_step_ratio: must be > 1, got {max_step_ratio}")
    if t.shape[0] < 3:
        return t.copy()
    dt = np.diff(t)
    if np.any(~(dt > 0)):
        k = int(np.argmax(~(dt > 0)))
        raise ConfigurationError(f"t: not strictly increasing at sample {k + 1}")
    breaks = dt > max_step_ratio * np.median(dt)
    seg = np.concatenate([[0], np.cumsum(breaks)])  # stretch id of each sample
    first = np.concatenate([[0], np.flatnonzero(breaks) + 1])
    k = np.arange(t.shape[0]) - first[seg]  # index inside the stretch
    t_ref = t[first][seg]  # stretch start, subtracted for accuracy at epoch-sized times
    y = t - t_ref
    count = np.bincount(seg).astype(float)
    k_mean = np.bincount(seg, k) / count
    y_mean = np.bincount(seg, y) / count
    dk = k - k_mean[seg]
    skk = np.bincount(seg, dk * dk)
    sky = np.bincount(seg, dk * (y - y_mean[seg]))
    slope = np.where(skk > 0, sky / np.where(skk > 0, skk, 1.0), 0.0)  # b = S_ky / S_kk
    fitted = y_mean[seg] + slope[seg] * dk  # t_k = a + b k, about the stretch means
    return t_ref + fitted


# ------------------------------------------------------------------------------------------ least squares


def weighted_least_squares(
    H: Array,
    z: Array,
    sigma: Array,
    *,
    lower: Array | None = None,
    bound_tol: float = 1e-12,
) -> LeastSquaresSolution:
    """min |W (H theta - z)|^2 over theta >= lower, W = diag(1 / sigma_i), rows of all samples stacked.

    Parameters
    ----------
    H : (N, n, p);  z : (N, n);  sigma : (n,) > 0;  lower : (p,) or None (unbounded)
    bound_tol : tolerance of the bounded solver (``lsq_linear`` tol), only used when a bound is active

    Returns
    -------
    LeastSquaresSolution; without an active bound ``theta`` is exactly ``scipy.linalg.lstsq`` of the weighted system.
    """
    H = np.asarray(H, dtype=float)
    if H.ndim != 3:
        raise ShapeError(f"H: expected shape (N, n, p), got {H.shape}")
    n_samples, n, p = H.shape
    z = np.asarray(z, dtype=float)
    expect_shape("z", z, (n_samples, n))
    sigma = np.asarray(sigma, dtype=float)
    expect_shape("sigma", sigma, (n,))
    A = (H / sigma[None, :, None]).reshape(n_samples * n, p)  # A = W H
    b = (z / sigma[None, :]).reshape(n_samples * n)  # b = W z
    theta = scipy.linalg.lstsq(A, b)[0]
    at_bound = np.zeros(p, dtype=bool)
    if lower is not None:
        lo = np.asarray(lower, dtype=float)
        expect_shape("lower", lo, (p,))
        if np.any(theta < lo):  # a bound is broken: bounded-variable least squares, column-scaled
            norms = np.linalg.norm(A, axis=0)
            d = np.where(norms > 0, 1.0 / np.where(norms > 0, norms, 1.0), 1.0)  # D = diag(1 / |A_:,j|)
            res = scipy.optimize.lsq_linear(
                A * d, b, bounds=(lo / d, np.full(p, np.inf)), method="bvls", tol=bound_tol
            )  # y = D^-1 theta keeps the bound's sign (d > 0)
            theta = res.x * d
            at_bound = np.isclose(theta, lo, rtol=0.0, atol=1e-12 * max(1.0, float(np.max(np.abs(theta)))))
    residual = (b - A @ theta).reshape(n_samples, n)
    return LeastSquaresSolution(theta=theta, residual=residual, at_bound=at_bound)


def scaled_singular_values(A: Array) -> tuple[Array, Array, Array]:
    """SVD of the column-scaled matrix A D, D = diag(1 / |A_:,j|) (zero columns keep scale 1).

    Returns (s (p,) descending, V (p, p) with the right singular vectors as columns, d (p,)).
    """
    norms = np.linalg.norm(A, axis=0)
    d = np.where(norms > 0, 1.0 / np.where(norms > 0, norms, 1.0), 1.0)
    r = np.linalg.qr(A * d, mode="r")  # A D = Q R: R (p, p) has the same singular values and right vectors
    _, s, vt = np.linalg.svd(r)
    return s, vt.T, d


# ------------------------------------------------------------------------------------------ identification


def _regressor(
    mechanism: Mechanism,
    run: ConditionedRun,
    settings: CommissioningSettings,
    payload_mode: str,
    nominal_payload: Array | None,
) -> tuple[Array, Array, list[str], int]:
    """(z (K, n), H (K, n, p), names, n_payload) of the measurement model in the module docstring."""
    n = int(mechanism.n_actuators)
    tau_known, Y_p, qd = regressor_at_efforts(mechanism, run.motion_at_efforts())
    if payload_mode == PAYLOAD_SPLIT:
        Y_pay = np.concatenate([Y_p, Y_p * run.gripping[:, None, None]], axis=2)  # [Y_p, Y_p g_k]
        pay_names = list(DELTA_PAYLOAD_NAMES)
    elif payload_mode == PAYLOAD_FULL:
        Y_pay = Y_p
        pay_names = _payload_names(Y_p.shape[2])
    else:  # mass only: the nominal first and second moments go to the known side
        if nominal_payload is None:
            raise ConfigurationError("nominal_payload: needed for the mass-only payload model")
        tau_known = tau_known + np.einsum("Nij,j->Ni", Y_p[:, :, 1:], nominal_payload[1:])
        Y_pay = Y_p[:, :, :1]
        pay_names = _payload_names(Y_p.shape[2])[:1]
    w = settings.work_piece_per_kg
    if payload_mode != PAYLOAD_SPLIT and w is not None:  # the part clamped while gripping: [.., Y_p w g_k]
        w = np.asarray(w, dtype=float)
        if w.shape != (Y_p.shape[2],):
            raise ConfigurationError(f"work_piece_per_kg: expected {Y_p.shape[2]} numbers, got {w.shape}")
        y_work = (Y_p @ w) * run.gripping[:, None]
        Y_pay = np.concatenate([Y_pay, y_work[:, :, None]], axis=2)
        pay_names = [*pay_names, "work_piece_mass"]
    Y_f = friction_regressor(qd, smooth_velocity=settings.smooth_velocity, stribeck_velocity=settings.stribeck_velocity)
    H = np.concatenate([Y_pay, Y_f], axis=2)  # (K, n, p)
    z = run.effort - tau_known  # z = tau_meas - tau_known
    names = pay_names + parameter_names(n, stribeck=settings.stribeck_velocity is not None)
    return z, H, names, len(pay_names)


def _payload_names(p: int) -> list[str]:
    if p == len(HEXAPOD_PAYLOAD_NAMES):
        return [f"payload_{s}" for s in HEXAPOD_PAYLOAD_NAMES]
    return [f"payload_{i + 1}" for i in range(p)]


def _lower_bounds(names: list[str], n_payload: int, payload_mode: str) -> Array:
    """Coulomb, viscous and masses >= 0; everything else unbounded."""
    lo = np.full(len(names), -np.inf)
    for j, name in enumerate(names):
        if name.startswith(("coulomb_", "viscous_")):
            lo[j] = 0.0
    if payload_mode == PAYLOAD_SPLIT:
        lo[:n_payload] = 0.0
    else:
        lo[0] = 0.0  # payload mass
    lo[[j for j, name in enumerate(names) if name == "work_piece_mass"]] = 0.0
    return lo


def actuator_motion(qd: Array, moving_speed: float) -> tuple[ActuatorMotion, ...]:
    """Share of samples each actuator spent above ``moving_speed`` in each direction, qd (K, n)."""
    k = max(qd.shape[0], 1)
    pos = np.sum(qd > moving_speed, axis=0) / k
    neg = np.sum(qd < -moving_speed, axis=0) / k
    peak = np.max(np.abs(qd), axis=0) if qd.shape[0] else np.zeros(qd.shape[1])
    return tuple(
        ActuatorMotion(
            index=i, positive_fraction=float(pos[i]), negative_fraction=float(neg[i]), peak_speed=float(peak[i])
        )
        for i in range(qd.shape[1])
    )


def identify_run(
    mechanism: Mechanism,
    run: ConditionedRun,
    settings: CommissioningSettings,
    *,
    payload: str = "auto",
    nominal_payload: Array | None = None,
) -> Identification:
    """Weighted least-squares identification of payload, friction and noise from a conditioned healthy run.

    Parameters
    ----------
    mechanism : the robot's rigid model (p = 1: delta, tool and work-piece masses; p > 1: hexapod)
    run : :func:`condition_run` output
    settings : :class:`CommissioningSettings`
    payload : "auto", "full" or "mass" (models with p > 1 only); "auto" falls back to the mass alone when the run
        cannot see the other payload parameters
    nominal_payload : (p,) the described payload, needed for "mass" and "auto" on models with p > 1

    Raises
    ------
    InsufficientDataError if fewer than ``min_samples_per_parameter`` usable samples per parameter remain.
    """
    p_model = int(mechanism.n_payload_parameters)
    if p_model == 1:
        mode = PAYLOAD_SPLIT
    elif payload in ("auto", "full"):
        mode = PAYLOAD_FULL
    elif payload == "mass":
        mode = PAYLOAD_MASS
    else:
        raise ConfigurationError(f"payload: must be 'auto', 'full' or 'mass', got {payload!r}")
    if p_model > 1 and payload in ("auto", "mass"):
        if nominal_payload is None:
            raise ConfigurationError(f"nominal_payload: needed with payload={payload!r} on a model with p > 1")
        nominal_payload = np.asarray(nominal_payload, dtype=float)
        expect_shape("nominal_payload", nominal_payload, (p_model,))
    result = _identify(mechanism, run, settings, mode, nominal_payload)
    if p_model > 1 and payload == "auto" and not result.identified[1:p_model].all():
        result = _identify(mechanism, run, settings, PAYLOAD_MASS, nominal_payload)
    return result


@dataclass(frozen=True, slots=True)
class StribeckSearch:
    """The Stribeck velocity a run supports (:func:`identify_stribeck_velocity`)."""

    velocity: float | None  # v_st chosen [rad/s | m/s], or None: the run does not support the term
    candidates: Array  # (C,) v_st tried [rad/s | m/s], ascending
    cost: Array  # (C,) J(v_st) = sum_i ln sigma_i^2 of each fit (lower fits better) [-]
    cost_without: float  # J of the fit without the Stribeck term
    statistic: float  # -2 ln(likelihood ratio) = K (J_without - J(v_best)) [-]
    threshold: float  # chi-square quantile the statistic had to pass [-]
    identification: Identification  # the fit the choice leads to (with the term at ``velocity``, or without)
    velocity_unit: str = "rad/s"

    @property
    def reason(self) -> str:
        """The choice in words."""
        if self.velocity is not None:
            return (
                f"Stribeck term at v_st = {self.velocity:.3g} {self.velocity_unit} (likelihood-ratio statistic "
                f"{self.statistic:.3g} "
                f"> {self.threshold:.3g})"
            )
        if not self.statistic > self.threshold:
            return (
                f"no Stribeck term: it does not fit the run better (likelihood-ratio statistic "
                f"{self.statistic:.3g} <= {self.threshold:.3g})"
            )
        return "no Stribeck term: the run does not separate its level from the Coulomb friction"


def identify_stribeck_velocity(
    mechanism: Mechanism,
    run: ConditionedRun,
    settings: CommissioningSettings,
    *,
    payload: str = "auto",
    nominal_payload: Array | None = None,
    low: float | None = None,
    high: float | None = None,
    grid: int = 9,
    significance: float = 1e-3,
) -> StribeckSearch:
    """Choose the Stribeck velocity v_st of the friction column ``F_st s(qd) exp(-(qd / v_st)^2)`` from a run.

    The model is linear in every parameter but v_st, so v_st is found by profiling: for each v_st the run is
    identified by :func:`identify_run` and scored by the concentrated Gaussian log-likelihood with one noise
    variance per actuator, ``ln L = -K/2 sum_i ln sigma_i^2 + const``, i.e. the cost ``J = sum_i ln sigma_i^2``
    (e.g. Ljung, "System Identification: Theory for the User", 2nd ed., 1999, sec. 7.4, from memory). The
    candidates are ``grid`` velocities spaced evenly in log between ``low`` (default 2 v_s) and ``high`` (default
    200 v_s); the best one is refined by a bounded scalar search (``scipy.optimize.minimize_scalar``) on ln v_st
    between its neighbours. The term is kept only if the likelihood-ratio statistic ``K (J_without - J_best)``
    exceeds the chi-square quantile ``1 - significance`` with n + 1 degrees of freedom (n levels and v_st;
    Wilks' theorem) and the run saw every Stribeck level (none of them unseen). Residuals correlated in time
    make the statistic too large, so the test is lenient towards the term; the excitation check is what keeps
    an unseparable term out.
    """
    v_s = settings.smooth_velocity
    lo = 2.0 * v_s if low is None else float(low)
    hi = 200.0 * v_s if high is None else float(high)
    if not (0.0 < lo < hi and np.isfinite(hi)) or grid < 3:
        raise ConfigurationError(f"Stribeck search: need 0 < low < high and grid >= 3, got {lo}, {hi}, {grid}")
    n = int(mechanism.n_actuators)

    fits: dict[float | None, Identification] = {}  # every fit made, by v_st: none is solved twice

    def fit(v_st: float | None) -> Identification:
        if v_st not in fits:
            fits[v_st] = identify_run(
                mechanism,
                run,
                dataclasses.replace(settings, stribeck_velocity=v_st),
                payload=payload,
                nominal_payload=nominal_payload,
            )
        return fits[v_st]

    def cost(v_st: float | None) -> float:
        return float(np.sum(np.log(fit(v_st).noise_std ** 2)))

    candidates = np.geomspace(lo, hi, grid)
    costs = np.array([cost(float(v)) for v in candidates])
    j = int(np.argmin(costs))
    bracket = (np.log(candidates[max(j - 1, 0)]), np.log(candidates[min(j + 1, grid - 1)]))
    refined = scipy.optimize.minimize_scalar(
        lambda log_v: cost(float(np.exp(log_v))), bounds=bracket, method="bounded", options={"xatol": 0.02}
    )
    best_v = float(np.exp(refined.x)) if refined.fun < costs[j] else float(candidates[j])
    best, without = fit(best_v), fit(None)
    statistic = float(best.n_samples * (cost(None) - cost(best_v)))
    threshold = float(scipy.stats.chi2.isf(significance, n + 1))
    stribeck = [k for k, name in enumerate(best.parameter_names) if name.startswith("stribeck_")]
    seen = bool(best.identified[stribeck].all())
    keep = statistic > threshold and seen
    return StribeckSearch(
        velocity=best_v if keep else None,
        candidates=candidates,
        cost=costs,
        cost_without=cost(None),
        statistic=statistic,
        threshold=threshold,
        identification=best if keep else without,
        velocity_unit=settings.velocity_unit,
    )


@dataclass(frozen=True, slots=True)
class _Fit:
    theta: Array
    cov: Array
    sigma: Array
    residual: Array  # (K, n) [N m | N]
    at_bound: BoolArray
    dof: int
    A: Array  # (K n, p) weighted regressor of the final weights


def _fit(H: Array, z: Array, lower: Array, settings: CommissioningSettings) -> _Fit:
    """Equal weights, reweighting from the residuals, final solve; covariance s^2 (A^T A)^-1."""
    k_samples, n, p = H.shape
    sigma = np.ones(n)
    dof_i = k_samples - p / n  # per-actuator share of the degrees of freedom
    for _ in range(settings.weight_iterations + 1):  # equal weights, then reweight from the residuals
        sol = weighted_least_squares(H, z, sigma, lower=lower)
        r = sol.residual * sigma[None, :]  # back to [N m | N]
        sigma = np.sqrt(np.sum(r**2, axis=0) / dof_i)  # sigma_i^2 = sum_k r_ki^2 / (K - p / n)
        sigma = np.where(sigma > 0, sigma, np.finfo(float).tiny ** 0.25)
    sol = weighted_least_squares(H, z, sigma, lower=lower)  # final solve with the final weights
    A = (H / sigma[None, :, None]).reshape(k_samples * n, p)
    dof = k_samples * n - p
    s2 = float(np.sum(sol.residual**2)) / dof  # s^2 = |b - A theta|^2 / (N n - p)
    sv, V, d = scaled_singular_values(A)
    s_floor = np.maximum(sv, sv[0] * 1e-9)  # keeps Cov finite should a direction still be weak
    cov = s2 * (d[:, None] * V) @ np.diag(s_floor**-2) @ (d[:, None] * V).T  # s^2 (A^T A)^-1 = s^2 D V S^-2 V^T D
    return _Fit(sol.theta, 0.5 * (cov + cov.T), sigma, sol.residual * sigma[None, :], sol.at_bound, dof, A)


def _identify(
    mechanism: Mechanism,
    run: ConditionedRun,
    settings: CommissioningSettings,
    mode: str,
    nominal_payload: Array | None,
) -> Identification:
    k_samples = run.n_samples
    z, H, names, n_payload = _regressor(mechanism, run, settings, mode, nominal_payload)
    p = H.shape[2]
    need = settings.min_samples_per_parameter * p
    if k_samples < need:
        raise InsufficientDataError(
            f"samples: {k_samples} usable samples after conditioning (of {run.n_raw} recorded); "
            f"{p} parameters need at least {need} ({settings.min_samples_per_parameter} per parameter)"
        )
    lower = _lower_bounds(names, n_payload, mode)
    fit = _fit(H, z, lower, settings)
    s, V, _ = scaled_singular_values(fit.A)  # excitation of the full model
    motion = actuator_motion(run.qd, settings.moving_speed)
    norms = np.linalg.norm(fit.A, axis=0)
    empty = norms <= settings.empty_column_rtol * np.max(norms)  # no effect on the efforts at all
    unseen = _unseen(names, s, V, settings, motion, run.gripping, mode, empty)
    unseen_names = {name for u in unseen for name in u.parameters}
    identified = np.array([name not in unseen_names for name in names])
    keep = np.array([name not in {h for u in unseen for h in u.held} for name in names])
    theta = np.zeros(p)  # held parameters stay at 0: their effect is absorbed by, or lost with, the others
    cov = np.zeros((p, p))
    at_bound = np.zeros(p, dtype=bool)
    kappa = float(s[0] / s[-1]) if s[-1] > 0 else float("inf")
    fitted_kappa = kappa
    if not keep.all():  # solve again without the parameters the run could not see
        fit = _fit(H[:, :, keep], z, lower[keep], settings)
        s_fit = scaled_singular_values(fit.A)[0]
        fitted_kappa = float(s_fit[0] / s_fit[-1]) if s_fit[-1] > 0 else float("inf")
    theta[keep] = fit.theta
    cov[np.ix_(keep, keep)] = fit.cov
    at_bound[keep] = fit.at_bound
    std = np.sqrt(np.diag(cov))
    t_q = float(scipy.stats.t.ppf(0.5 + 0.5 * settings.confidence, fit.dof))  # Student t quantile
    half = np.where(keep, t_q * std, np.nan)  # no interval for a held parameter
    payload_parameters = None
    if mode == PAYLOAD_FULL:
        payload_parameters = theta[: int(mechanism.n_payload_parameters)].copy()  # the work piece's mass apart
    elif mode == PAYLOAD_MASS:
        if nominal_payload is None:
            raise ConfigurationError("nominal_payload: needed for the mass-only payload model")
        payload_parameters = np.concatenate([theta[:1], nominal_payload[1:]])
    return Identification(
        parameter_names=tuple(names),
        theta=theta,
        covariance=cov,
        ci_low=theta - half,  # theta_j - t_{1 - alpha/2, dof} sqrt(Cov_jj)
        ci_high=theta + half,
        identified=identified,
        held=~keep,
        at_bound=at_bound,
        noise_std=fit.sigma,
        residual=fit.residual,
        dof=fit.dof,
        confidence=settings.confidence,
        condition_number=kappa,
        fitted_condition_number=fitted_kappa,
        singular_values=s,
        unseen=unseen,
        motion=motion,
        payload_mode=mode,
        payload_parameters=payload_parameters,
        n_payload=n_payload,
        n_samples=k_samples,
        gripping_fraction=float(np.mean(run.gripping)),
    )


def _actuator_of(name: str) -> tuple[str, int] | None:
    """("coulomb", 2) for "coulomb_2"; None for a payload parameter."""
    head, _, tail = name.rpartition("_")
    if head in ("coulomb", "viscous", "offset", "stribeck") and tail.isdigit():
        return head, int(tail)
    return None


def _unseen(
    names: list[str],
    s: Array,
    V: Array,
    settings: CommissioningSettings,
    motion: tuple[ActuatorMotion, ...],
    gripping: Array,
    mode: str,
    empty: BoolArray,
) -> tuple[UnseenDirection, ...]:
    """Findings from the actuators' motion first, then the small singular values not yet explained."""
    found: list[UnseenDirection] = []
    frac = settings.min_motion_fraction
    v = settings.moving_speed
    unit = settings.velocity_unit
    has_stribeck = settings.stribeck_velocity is not None
    for m in motion:
        i = m.index + 1
        if not m.moved(frac):
            params = [f"coulomb_{i}", f"viscous_{i}"] + ([f"stribeck_{i}"] if has_stribeck else [])
            found.append(
                UnseenDirection(
                    tuple(params),
                    f"the run never moved actuator {i} faster than {v:.3g} {unit} (peak {m.peak_speed:.3g} {unit}), "
                    f"so its Coulomb and viscous friction could not be seen",
                    0.0,
                    tuple(params),
                )
            )
        elif not m.reversed(frac):
            direction = "positive" if m.positive_fraction >= m.negative_fraction else "negative"
            params = [f"coulomb_{i}", f"offset_{i}"] + ([f"stribeck_{i}"] if has_stribeck else [])
            found.append(
                UnseenDirection(
                    tuple(params),
                    f"the run never reversed actuator {i} at speed (it moved in the {direction} direction only), "
                    f"so its Coulomb friction is not separable from its offset",
                    0.0,
                    tuple(p for p in params if not p.startswith("offset_")),  # the offset absorbs F_c
                )
            )
    if "work_piece_mass" in names:
        g = float(np.mean(gripping))
        carrier = names[0]  # the tool's (delta) or the fixture's (hexapod) mass
        if g < frac:
            found.append(
                UnseenDirection(
                    ("work_piece_mass",),
                    "the tool never gripped during the run, so the work-piece mass was not seen",
                    0.0,
                    ("work_piece_mass",),
                )
            )
        elif g > 1.0 - frac:
            found.append(
                UnseenDirection(
                    (carrier, "work_piece_mass"),
                    "the tool gripped throughout the run, so the work-piece mass is not separable from the "
                    + ("tool mass" if mode == PAYLOAD_SPLIT else "fixture's payload"),
                    0.0,
                    ("work_piece_mass",),  # the tool (fixture) mass then carries tool + work piece
                )
            )
    explained = {name for u in found for name in u.parameters}
    blank = [names[j] for j in np.flatnonzero(empty) if names[j] not in explained]
    if blank:
        found.append(
            UnseenDirection(
                tuple(blank),
                f"the run's motion never showed the effect of {', '.join(blank)} (their regressor columns are empty)",
                0.0,
                tuple(blank),
            )
        )
        explained |= set(blank)
    small = np.flatnonzero(s < s[0] / settings.max_condition)
    for j in small:
        w = V[:, j]
        involved = [names[i] for i in np.flatnonzero(np.abs(w) > settings.involvement)]
        if not involved:
            involved = [names[int(np.argmax(np.abs(w)))]]
        if set(involved) <= explained:
            continue
        held = {h for u in found for h in u.held}
        free = [i for i in np.argsort(-np.abs(w)) if names[i] not in held]
        drop = (names[int(free[0])],) if free else ()  # the strongest member of the direction goes
        ratio = float(s[j] / s[0])
        found.append(UnseenDirection(tuple(involved), _explain(involved, w, names, ratio), ratio, drop))
        explained |= set(involved)
    return tuple(found)


def _explain(involved: list[str], w: Array, names: list[str], ratio: float) -> str:
    """Words for one small singular direction."""
    parts = [_actuator_of(n) for n in involved]
    actuators = {p[1] for p in parts if p is not None}
    kinds = {p[0] for p in parts if p is not None}
    if len(actuators) == 1 and all(p is not None for p in parts):
        i = next(iter(actuators))
        if {"coulomb", "offset"} <= kinds:
            return (
                f"the run never reversed actuator {i} at speed, "
                "so its Coulomb friction is not separable from its offset"
            )
        if {"coulomb", "viscous"} <= kinds:
            return f"actuator {i} ran at nearly one speed, so its Coulomb and viscous friction are not separable"
    combo = " ".join(f"{w[names.index(n)]:+.2f} {n}" for n in involved)
    return (
        f"the run does not separate {', '.join(involved)} (the combination {combo} is {ratio:.1e} of the "
        f"best-seen direction); add motion that changes their effort patterns differently"
    )


# ------------------------------------------------------------------------------------------ viscous temperature


@dataclass(frozen=True, slots=True)
class ViscousTemperatureFit:
    """The viscous temperature coefficient k_v per actuator from a run's drive temperatures (module docstring).

    coefficient_per_k : (n,) k_v [1/K], NaN where not identified
    std_per_k, ci_low, ci_high : (n,) its standard deviation and interval [1/K], NaN where not identified
    reference_temperature_k : (n,) T_ref [K], the v^2-weighted mean drive temperature; NaN without temperatures
    viscous_at_reference : (n,) b at T_ref from this fit [N m s/rad | N s/m], NaN where not identified
    span_k : (n,) max - min of the drive temperature over the samples used [K], NaN without temperatures
    identified : (n,) bool
    explanations : one sentence per actuator not identified, saying why
    iterations : Gauss-Newton iterations used
    """

    coefficient_per_k: Array
    std_per_k: Array
    ci_low: Array
    ci_high: Array
    reference_temperature_k: Array
    viscous_at_reference: Array
    span_k: Array
    identified: BoolArray
    explanations: tuple[str, ...]
    iterations: int
    confidence: float


def _fixed_weight_fit(H: Array, z: Array, sigma: Array, used: int) -> _Fit:
    """Unbounded weighted least squares with fixed weights 1 / sigma_i; ``used`` entries of (K, n) carry data (the
    others are zero rows); covariance s^2 (A^T A)^-1, s^2 = |b - A theta|^2 / (used - p)."""
    k_samples, n, p = H.shape
    sol = weighted_least_squares(H, z, sigma)
    A = (H / sigma[None, :, None]).reshape(k_samples * n, p)
    dof = max(used - p, 1)
    s2 = float(np.sum(sol.residual**2)) / dof
    sv, V, d = scaled_singular_values(A)
    s_floor = np.maximum(sv, sv[0] * 1e-9)
    cov = s2 * (d[:, None] * V) @ np.diag(s_floor**-2) @ (d[:, None] * V).T  # s^2 D V S^-2 V^T D
    return _Fit(sol.theta, 0.5 * (cov + cov.T), sigma, sol.residual * sigma[None, :], sol.at_bound, dof, A)


def identify_viscous_temperature(
    mechanism: Mechanism,
    run: ConditionedRun,
    ident: Identification,
    settings: CommissioningSettings,
) -> ViscousTemperatureFit:
    """k_v per actuator by Gauss-Newton on the measurement model with ``b exp(-k_v (T - T_ref)) qd`` (module
    docstring), with the parameters ``ident`` held left out as there.

    Parameters
    ----------
    mechanism, settings : as for :func:`identify_run`
    run : :func:`condition_run` output; its ``temperature`` (K, n) [K] is what shows k_v (None: nothing to see)
    ident : :func:`identify_run` of the same run (payload model, held parameters, noise)

    Returns
    -------
    ViscousTemperatureFit; actuators whose run could not show k_v are NaN there and explained in words.
    """
    n = int(mechanism.n_actuators)
    nan = np.full(n, np.nan)
    if run.temperature is None or not np.any(np.isfinite(run.temperature)):
        why = ("the recording carries no drive temperatures, so no viscous temperature coefficient could be seen",)
        return ViscousTemperatureFit(nan, nan, nan, nan, nan, nan, nan, np.zeros(n, dtype=bool), why, 0,
                                     settings.confidence)  # fmt: skip
    T_all = np.asarray(run.temperature, dtype=float)
    expect_shape("run.temperature", T_all, (run.n_samples, n))
    has_t = np.any(np.isfinite(T_all), axis=0)  # (n,) actuators with a recorded temperature
    rows = np.all(np.isfinite(T_all[:, has_t]), axis=1)  # samples where every recorded temperature is there
    z, H, names, n_payload = _regressor(mechanism, run, settings, ident.payload_mode, ident.payload_parameters)
    keep = ~ident.held
    z, H, T = z[rows], H[rows][:, :, keep], np.where(has_t[None, :], T_all[rows], 0.0)
    kept = [name for name, k in zip(names, keep, strict=True) if k]
    visc = np.array([kept.index(f"viscous_{i + 1}") if f"viscous_{i + 1}" in kept else -1 for i in range(n)])
    idx = np.arange(n)
    v = np.where(visc[None, :] >= 0, H[:, idx, np.maximum(visc, 0)], 0.0)  # (K', n) the viscous columns, qd
    w = v**2
    sw = w.sum(axis=0)
    T_ref = np.where(has_t & (sw > 0), (w * T).sum(axis=0) / np.where(sw > 0, sw, 1.0), nan)  # sum v^2 T / sum v^2
    T_ref = np.where(has_t & ~(sw > 0), T.mean(axis=0) if T.shape[0] else nan, T_ref)
    span = np.where(has_t, np.ptp(T, axis=0) if T.shape[0] else nan, nan)
    seen_v = (visc >= 0) & np.array([bool(ident.identified[names.index(f"viscous_{i + 1}")]) for i in range(n)])
    cand = has_t & seen_v & (span >= settings.min_temperature_span_k)
    dT = np.where(cand[None, :], T - np.where(np.isfinite(T_ref), T_ref, 0.0)[None, :], 0.0)  # dT = T - T_ref
    c_idx = np.flatnonzero(cand)
    beta = np.zeros(n)
    fast = np.abs(v) >= settings.temperature_speed  # (K', n) entries on the viscous branch of the friction curve
    fast[:, ~cand] = True  # actuators without a temperature fit keep every sample
    H = np.where(fast[:, :, None], H, 0.0)  # weight 0 for the slow entries (the Stribeck region)
    z = np.where(fast, z, 0.0)
    p = H.shape[2] + c_idx.size
    used = int(fast.sum())
    fit = None
    iterations, converged = 0, False
    if c_idx.size and used >= settings.min_samples_per_parameter * p:
        for it in range(1, settings.temperature_iterations + 1):
            iterations = it
            e = np.exp(-beta[None, :] * dT)  # e = exp(-k^(m) dT)
            Hs = H.copy()
            for i in c_idx:
                Hs[:, :, visc[i]] *= e[:, i][:, None]  # viscous column of i: b e qd
            G = np.zeros((H.shape[0], n, c_idx.size))
            G[:, c_idx, np.arange(c_idx.size)] = -dT[:, c_idx] * e[:, c_idx] * np.where(fast, v, 0.0)[:, c_idx]
            fit = _fixed_weight_fit(np.concatenate([Hs, G], axis=2), z, ident.noise_std, used)  # g_i = -dT e qd
            b = fit.theta[visc[c_idx]]
            step = fit.theta[H.shape[2] :] / np.where(b != 0, b, np.inf)  # d = c / b
            beta[c_idx] += step  # k^(m+1) = k^(m) + c / b
            if np.all(np.abs(step) < settings.temperature_tol_per_k):
                converged = True
                break
    std = nan.copy()
    b_ref = nan.copy()
    if fit is not None:
        b = fit.theta[visc[c_idx]]
        var_c = np.diag(fit.cov)[H.shape[2] :]
        std[c_idx] = np.sqrt(var_c) / np.abs(np.where(b != 0, b, np.nan))  # Var(k) = Var(c) / b^2 at c = 0
        b_ref[c_idx] = b
    dof = max(used - p, 1)
    t_q = float(scipy.stats.t.ppf(0.5 + 0.5 * settings.confidence, dof))  # Student t quantile
    half = t_q * std
    ok = cand & converged & np.isfinite(half) & (half <= settings.max_temperature_halfwidth_per_k)
    explanations = []
    for i in range(n):
        a = i + 1
        if ok[i]:
            continue
        if not has_t[i]:
            explanations.append(f"actuator {a}: the recording carries no drive temperature for it")
        elif not seen_v[i]:
            explanations.append(f"actuator {a}: its viscous friction was not seen, so neither was its temperature law")
        elif span[i] < settings.min_temperature_span_k:
            explanations.append(
                f"actuator {a}: its drive temperature spanned only {span[i]:.2g} K during the run (at least "
                f"{settings.min_temperature_span_k:g} K needed), too little to see how its viscous friction follows it"
            )
        elif fit is None:
            explanations.append(f"actuator {a}: too few samples with temperatures to fit its temperature law")
        elif not converged:
            explanations.append(
                f"actuator {a}: the temperature law's fit did not settle in {iterations} Gauss-Newton iterations"
            )
        else:
            explanations.append(
                f"actuator {a}: its viscous temperature coefficient came out {beta[i]:.3g} +- {half[i]:.2g} 1/K, "
                f"too uncertain (the interval may be at most +- {settings.max_temperature_halfwidth_per_k:g} 1/K)"
            )
    coef = np.where(ok, beta, np.nan)
    return ViscousTemperatureFit(
        coefficient_per_k=coef,
        std_per_k=np.where(ok, std, np.nan),
        ci_low=np.where(ok, beta - half, np.nan),  # k_v - t std
        ci_high=np.where(ok, beta + half, np.nan),
        reference_temperature_k=T_ref,
        viscous_at_reference=np.where(ok, b_ref, np.nan),
        span_k=span,
        identified=ok,
        explanations=tuple(explanations),
        iterations=iterations,
        confidence=settings.confidence,
    )


# ------------------------------------------------------------------------------------------ baseline


def unseen_prior_std(run: ConditionedRun, ident: Identification, settings: CommissioningSettings) -> Array:
    """A wide prior std (k n,) for friction parameters the run could not see, from the run's own effort scale.

    Coulomb, offset and Stribeck: the RMS measured effort of the actuator (no friction term can plausibly exceed
    the effort it is part of); viscous: that RMS divided by max(peak speed, moving speed).
    """
    rms = np.sqrt(np.mean(run.effort**2, axis=0))  # (n,) [N m | N]
    speed = np.array([max(m.peak_speed, settings.moving_speed) for m in ident.motion])
    names = ident.parameter_names[ident.n_payload :]
    out = np.empty(len(names))
    for j, name in enumerate(names):
        cls, i = _actuator_of(name) or ("", 1)
        out[j] = rms[i - 1] / speed[i - 1] if cls == "viscous" else rms[i - 1]
    return np.maximum(out, np.finfo(float).eps)


def baseline_from_identification(
    ident: Identification,
    n_actuators: int,
    *,
    unseen_std: Array,
    nominal_friction: Array | None = None,
    nominal_work_piece_kg: float | None = None,
    stribeck_velocity: float | None = None,
    work_piece_per_kg: Array | None = None,
) -> Baseline:
    """The live tracker's starting point from an identification.

    ``stribeck_velocity`` is the v_st the identification was made with (None: no Stribeck term); the baseline
    carries it, so that the live tracker follows the same friction form.

    A friction parameter the run could not see starts from its nominal value (``nominal_friction`` (k n,), if
    given; else the estimate) with the wide, uncorrelated std ``unseen_std[j]`` ((k n,), e.g. from
    :func:`unseen_prior_std`), so that the tracker learns it once the motion excites it. An unseen work-piece mass
    (delta, or the hexapod's part) starts from ``nominal_work_piece_kg`` (else 0); if the delta's tool gripped
    throughout, the tool mass is the estimate (tool + work piece) minus that nominal work piece (the hexapod's
    fixture parameters held fixture and part together, and lose ``nominal_work_piece_kg * work_piece_per_kg``).
    """
    p_f = len(ident.parameter_names) - ident.n_payload
    if p_f % n_actuators:
        raise ShapeError(f"parameters: {p_f} friction parameters do not split over {n_actuators} actuators")
    prior = np.asarray(unseen_std, dtype=float)
    expect_shape("unseen_std", prior, (p_f,))
    f = slice(ident.n_payload, None)
    theta_f = ident.theta[f].copy()
    cov_f = ident.covariance[f, f].copy()
    seen = ident.identified[f]
    if nominal_friction is not None:
        nominal = np.asarray(nominal_friction, dtype=float)
        expect_shape("nominal_friction", nominal, (p_f,))
        theta_f = np.where(seen, theta_f, nominal)
    for j in np.flatnonzero(~seen):  # decorrelate, then the wide prior on the diagonal
        cov_f[j, :] = 0.0
        cov_f[:, j] = 0.0
        cov_f[j, j] = prior[j] ** 2
    if ident.payload_mode == PAYLOAD_SPLIT:
        tool, work = float(max(ident.theta[0], 0.0)), float(max(ident.theta[1], 0.0))
        if not ident.identified[1]:
            work = 0.0 if nominal_work_piece_kg is None else float(nominal_work_piece_kg)
            if not ident.identified[0]:  # gripping throughout: theta_0 = tool + work piece
                tool = max(tool - work, 0.0)
        payload = None
    else:
        if ident.payload_parameters is None:
            raise ConfigurationError("identification: a multi-parameter payload model without payload_parameters")
        tool, work = float(max(ident.payload_parameters[0], 0.0)), 0.0
        payload = ident.payload_parameters
        if "work_piece_mass" in ident.parameter_names:  # the hexapod's part, fitted beside the fixture
            j = ident.parameter_names.index("work_piece_mass")
            work = float(max(ident.theta[j], 0.0))
            if not ident.identified[j]:
                work = 0.0 if nominal_work_piece_kg is None else float(nominal_work_piece_kg)
                if ident.gripping_fraction > 0.5 and work_piece_per_kg is not None:  # gripping throughout: the
                    payload = payload - work * np.asarray(work_piece_per_kg, dtype=float)  # fixture carried the part
                    tool = float(max(payload[0], 0.0))
        elif nominal_work_piece_kg is not None:
            work = float(nominal_work_piece_kg)
    return Baseline(
        friction_parameters=theta_f,
        friction_covariance=cov_f,
        noise_std=ident.noise_std,
        tool_mass_kg=tool,
        work_piece_mass_kg=work,
        payload_parameters=payload,
        stribeck_velocity=stribeck_velocity,
    )


# ------------------------------------------------------------------------------------------ drive gains


def calibrate_gains(
    mechanism: Mechanism,
    run_plain: ConditionedRun,
    run_loaded: ConditionedRun,
    test_parameters: Array,
    settings: CommissioningSettings,
    *,
    trust_rigid_model: bool = False,
) -> GainCalibration:
    """Relative drive gains from a run without and a run with a known test body (added-mass method).

    Parameters
    ----------
    run_plain, run_loaded : conditioned runs without / with the test body; efforts from the nominal gains
    test_parameters : (p_m,) the model's payload parameters of the test body alone (delta: [mass])
    trust_rigid_model : True takes the model's own rigid efforts at face value (c_i = 1); False fits their scale

    Returns
    -------
    GainCalibration; gamma_i > 1 means the drive produces more effort per ampere than its nominal gain says.
    """
    p_model = int(mechanism.n_payload_parameters)
    pi_t = np.asarray(test_parameters, dtype=float)
    expect_shape("test_parameters", pi_t, (p_model,))
    n = int(mechanism.n_actuators)
    blocks = []
    gripped = bool(np.any(run_plain.gripping > 0) or np.any(run_loaded.gripping > 0))  # else no work-piece column
    for run, loaded in ((run_plain, 0.0), (run_loaded, 1.0)):
        tau_known, Y_p, qd = regressor_at_efforts(mechanism, run.motion_at_efforts())
        y_test = np.einsum("Nij,j->Ni", Y_p, pi_t) * loaded  # Y_p pi_t b_k
        if p_model == 1 and gripped:
            Y_pay = np.concatenate([Y_p, Y_p * run.gripping[:, None, None]], axis=2)
        elif settings.work_piece_per_kg is not None and gripped:  # the hexapod's part: [Y_p, Y_p w g_k]
            y_work = (Y_p @ np.asarray(settings.work_piece_per_kg, dtype=float)) * run.gripping[:, None]
            Y_pay = np.concatenate([Y_p, y_work[:, :, None]], axis=2)
        else:
            Y_pay = Y_p
        Y_f = friction_regressor(
            qd, smooth_velocity=settings.smooth_velocity, stribeck_velocity=settings.stribeck_velocity
        )
        idx = np.arange(n)
        k = settings.friction_per_actuator
        Y_f_own = Y_f.reshape(run.n_samples, n, n, k)[:, idx, idx, :]  # (K, n, k): actuator i's own columns
        if trust_rigid_model:
            cols = [(y_test + tau_known)[:, :, None], Y_pay, Y_f_own]
        else:
            cols = [y_test[:, :, None], tau_known[:, :, None], Y_pay, Y_f_own]
        X = np.concatenate(cols, axis=2)  # (K, n, c) per-actuator design
        blocks.append((X, run.effort))
    X = np.concatenate([b[0] for b in blocks])
    y = np.concatenate([b[1] for b in blocks])
    n_rows, _, c = X.shape
    dof = n_rows - c
    if dof < settings.min_samples_per_parameter * c:
        raise InsufficientDataError(f"samples: {n_rows} usable samples for {c} parameters per actuator")
    t_q = float(scipy.stats.t.ppf(0.5 + 0.5 * settings.confidence, dof))
    beta = np.empty(n)
    beta_std = np.empty(n)
    scale = np.full(n, np.nan)
    noise = np.empty(n)
    for i in range(n):  # one small least-squares problem per actuator
        Xi = X[:, i, :]
        coef = scipy.linalg.lstsq(Xi, y[:, i])[0]
        r = y[:, i] - Xi @ coef
        s2 = float(r @ r) / dof  # s^2 = |r|^2 / (K - c)
        s, V, d = scaled_singular_values(Xi)
        if s[-1] < s[0] / settings.max_condition:
            raise InsufficientDataError(
                f"actuator {i + 1}: the two runs do not separate the test body's effort from the rest "
                f"(condition number {s[0] / max(s[-1], 1e-300):.3g} > {settings.max_condition:g})"
            )
        cov = s2 * (d[:, None] * V) @ np.diag(s**-2) @ (d[:, None] * V).T  # s^2 (X^T X)^-1
        beta[i], beta_std[i] = coef[0], np.sqrt(cov[0, 0])
        noise[i] = np.sqrt(s2)
        if not trust_rigid_model:
            scale[i] = coef[1] / coef[0]  # c_i / beta_i: the model's rigid efforts in true units
    if np.any(~(beta - t_q * beta_std > 0)):
        i = int(np.argmax(~(beta - t_q * beta_std > 0)))
        raise InsufficientDataError(
            f"actuator {i + 1}: the test body's effort is not resolved "
            f"(beta = {beta[i]:.3g} +- {t_q * beta_std[i]:.2g})"
        )
    return GainCalibration(
        gain=1.0 / beta,  # gamma = 1 / beta
        ci_low=1.0 / (beta + t_q * beta_std),  # 1/x is decreasing: the upper end of beta gives the lower gain
        ci_high=1.0 / (beta - t_q * beta_std),
        beta=beta,
        beta_std=beta_std,
        model_scale=scale,
        noise_std=noise,
        dof=dof,
        confidence=settings.confidence,
    )

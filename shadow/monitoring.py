"""One robot's monitor: model -> estimator -> detectors, turning sample batches into store rows.

Pure computation (no I/O, no clock: "now" is the newest sample time), so the live service, an offline
analysis and the tests all run exactly the same code. Per batch of samples:

1. efforts: measured joint-side efforts, or motor currents converted with the drive gains
   (:func:`shadow.robots.drives.effort_from_current`);
2. :class:`~shadow.estimation.tracker.PayloadFrictionTracker`: conditioning, rigid-body regressor,
   batched Kalman filter; one output per ``output_period_s``;
3. per output: estimate rows (value, std, identifiable), residual aggregates (RMS and peak of the
   innovation per actuator, NIS per degree of freedom);
4. collisions: :class:`~shadow.detection.momentum_observer.CollisionMonitor` on the conditioned samples,
   with the friction estimated by the filter taken off the measured effort and the mass matrix at the
   estimated payload, both from the filter's estimate before the output (not yet fitted to the samples the
   observer looks at; the posterior while the prior is much less sure, after a pause, with a second pass on the
   prior when that sees a contact); each event gets an evidence window of raw samples (default 1 s each side),
   written once the stream has passed the window's end. An output with a contact in it (above threshold for
   ``min_duration_s``, on at most ``contact_max_fraction`` of it) is not learnt from: the filter goes back to
   its state before the output (at most ``contact_hold_outputs`` outputs in a row), so one impact is one event
   and does not leave its force in the friction and payload estimates;
5. payload faults (the delta's work piece, the hexapod's declared part): the carried mass of every transfer (a
   stretch with the tool gripping), estimated from that transfer alone with the filter's tool mass (fixture
   parameters) and friction taken off, along the work piece's column ``Y_p w``, checked against the work piece the
   description expects: missed pick (nothing carried), double pick, wrong work piece (outside the tolerance
   by more than 3 times the transfer mass's std combined with the transfer-to-transfer scatter); the observer
   sees a wrong carried mass as an external effort over the transfer, so collisions a transfer's mass explains
   are not left out of its weighing (only contacts are) and are folded into its payload fault. The hexapod's part
   is weighed against the filter state from before the output it began in, and a faulty one is undone (the
   filter goes back to that state), so that an empty clamp or a double part is not learnt as leg offsets. The
   delta's transfers are judged once the tool mass is known to a quarter of the work piece's tolerance; the
   hexapod's one by one, once the std of the transfer's mass from the filter's whole covariance is (missed and
   double picks: a tenth of the part's mass);
   payload changes: the mass of every single-piece transfer, and (delta) the tool's own mass weighed on every
   empty move the same way, each go to a :class:`~shadow.detection.change.MassStepWatch` (two-sided CUSUM, GLR
   for the masses before and after); a confirmed step is a ``payload_change`` event, the filter is told
   (:func:`~shadow.estimation.kalman.reset_parameter`) and later transfers are judged against the new mass;
6. wear: every ``wear_window_s`` the window's mean Coulomb and viscous friction per actuator and its mean
   drive temperature go to :class:`~shadow.detection.wear.WearMonitor` (indicator against the baseline's
   friction, Theil-Sen trend, forecast of the day the last level is crossed, level events). The viscous
   friction is brought to the temperature the baseline's friction holds at, ``b_ref = b exp(k (T - T_ref))``,
   with k per actuator from, in this order: the setting ``viscous_temperature_coefficient_per_k`` when given (an
   override), the coefficient identified at commissioning (the baseline), the description's declared one, else 0
   (no compensation); T_ref is the baseline's (commissioning) drive temperature, else the description's declared
   reference temperature (nominal baseline), else the first window's. An actuator without a temperature in a
   window is not compensated in it;
7. model drift: the innovation of every output goes to a :class:`~shadow.detection.modes.WelchAccumulator`
   (Hann segments of ``mode_segment_s``, 50 % overlap, at the stream's own sample period, learnt from the first
   output); every ``mode_window_s`` of stream gives a Welch PSD and the structural mode fitted to it
   (:func:`~shadow.detection.modes.estimate_mode`): two estimate rows ``mode_frequency_hz`` and
   ``mode_damping_ratio`` (identifiable when the fit is GOOD; no rows when no peak stands out). The median of the
   first ``mode_reference_estimates`` GOOD ones is the mode's reference; a GOOD frequency more than
   ``mode_drift_fraction`` below it is one ``drift`` event (a loosening joint or a cracked rod lowers the
   stiffness), re-armed once a frequency is back within half that fraction. The mode shows only where something
   excites it broadly (impacts, stops, quick moves); a smooth motion's residual is lines of its own harmonics,
   which give WEAK estimates at best. Per actuator, the innovation's RMS over each ``wear_window_s`` against the
   baseline's noise std: above ``residual_drift_ratio`` one ``drift`` event (calibration lost, backlash grown),
   re-armed below ``residual_drift_clear_ratio``; the first ``residual_drift_settle_s`` (the filter's start-up)
   are not counted, and a window is not judged when it holds a contact or a payload fault (their residual is
   theirs) or less than ``residual_drift_min_s`` of stream;
8. health per actuator and for the robot (:mod:`shadow.detection.health`), wear indicator included.

Carried mass of a transfer (weighted least squares on one scalar, the work-piece column of the regressor):
``z_k = tau_meas_k - tau_known_k - Y_p,k m_tool - tau_f,k``, ``m = sum Y^T W z / sum Y^T W Y`` with
``W = diag(1 / sigma_i^2)``, std ``1 / sqrt(sum Y^T W Y)`` (e.g. Montgomery, Peck and Vining, "Introduction to
Linear Regression Analysis", weighted least squares; from memory).

Collision thresholds (per actuator): the observer is a first-order low-pass of gain K_O on the effort
noise, so white effort noise of std sigma gives a residual of std
``sigma_r = sigma sqrt((1 - a) / (1 + a))``, ``a = exp(-K_O dt)`` (variance of a first-order
autoregression, e.g. Box and Jenkins, "Time Series Analysis", AR(1) variance; from memory). The threshold
is ``z_(1 - alpha/2) sigma_r`` for the per-sample alpha that bounds false alarms to the configured rate
(:func:`~shadow.detection.momentum_observer.alpha_for_false_alarm_rate`), plus a floor that absorbs
what the rigid model leaves out (structural modes, Stribeck friction, backlash), as a fraction of
the rated effort.
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np
from numpy.typing import NDArray
from scipy.stats import norm

from shadow.detection.change import MassStep, MassStepSettings, MassStepWatch
from shadow.detection.events import CollisionEvent
from shadow.detection.health import Health, HealthLimits, actuator_health, robot_health
from shadow.detection.modes import ModeQuality, WelchAccumulator, WelchEstimate, WelchSettings
from shadow.detection.momentum_observer import (
    MIN_EXTREME_VALUE_BLOCKS,
    CollisionMonitor,
    CollisionMonitorState,
    CollisionSettings,
    ObserverState,
    alpha_for_false_alarm_rate,
    extreme_value_thresholds,
    find_runs,
    residual_thresholds,
)
from shadow.detection.wear import (
    FrictionBaseline,
    TemperatureLaw,
    TemperatureModel,
    WearLevels,
    WearMonitor,
    wear_trend,
)
from shadow.errors import ConfigurationError, ShadowError
from shadow.estimation.baseline import Baseline
from shadow.estimation.kalman import FilterState, predict, reset_parameter
from shadow.estimation.tracker import PayloadFrictionTracker, TrackerOutput, TrackerSettings
from shadow.ingest.wire import PositionUnit, SampleBatch, encode_binary
from shadow.robots.delta import DeltaModel
from shadow.robots.description import DeltaTool, RobotDescription, build_model
from shadow.robots.drives import declared_effort_timing, effort_from_current
from shadow.robots.friction import friction_effort, friction_regressor
from shadow.robots.hexapod import HexapodModel
from shadow.robots.parameters import MeasuredQuantity
from shadow.store.repository import StepResults

Array = NDArray[np.float64]

EXTREME_VALUE_BLOCK_S = 1.0  # block length of the threshold calibration: longer than a pick-and-place cycle


@dataclass(frozen=True, slots=True)
class MonitorSettings:
    """Knobs of a robot's monitor, SI units."""

    tracker: TrackerSettings
    sample_rate_hz: float = 1000.0  # nominal stream rate, for the false-alarm bound
    observer_gain_per_s: float = 50.0  # K_O: residual time constant 1 / K_O = 20 ms
    false_alarms_per_day: float = 1.0
    threshold_floor_rated_fraction: float = 0.03  # model-error floor of the collision threshold
    evidence_before_s: float = 1.0
    evidence_after_s: float = 1.0
    # an output in which the observer saw a contact (above threshold for at least CollisionSettings.min_duration_s,
    # on at most this share of the output's samples) is not learnt from by the estimator; never more than
    # contact_hold_outputs outputs in a row (a lasting misfit is the model's to learn, not a contact)
    contact_max_fraction: float = 0.25
    contact_hold_outputs: int = 2
    observer_prior_std_ratio: float = 3.0  # the observer takes the prior estimate while it is this sure (see below)
    health_limits: HealthLimits = field(default_factory=HealthLimits)
    min_transfer_s: float = 0.1  # shorter gripping stretches are not judged
    wear_window_s: float = 600.0  # friction is averaged over windows this long for the wear trend
    wear_levels: WearLevels = field(default_factory=WearLevels)
    wear_reference_speed: float = 1.0  # v_ref of the wear indicator [rad/s | m/s]
    # k of exp(-k (T - T_ref)) for every actuator [1/K], overriding the baseline's and the description's; None: theirs
    viscous_temperature_coefficient_per_k: float | None = None
    tool_step_fraction: float = 0.05  # smallest change of the tool's own mass reported, fraction of its mass
    double_pick_ratio: float = 1.5  # carried / expected above this: two work pieces
    missed_pick_ratio: float = 0.5  # carried / expected below this: nothing carried
    mode_tracking: bool = True  # Welch PSD of the innovation and the structural mode fitted to it
    mode_segment_s: float = 4.0  # Welch segment [s]; PSD bins are 1 / mode_segment_s apart [Hz]
    mode_window_s: float = 60.0  # stream averaged into one mode estimate [s]
    mode_band_hz: tuple[float, float] = (5.0, 80.0)  # where the mode is looked for [Hz]
    mode_reference_estimates: int = 3  # the median of this many first GOOD estimates is the mode's reference
    mode_drift_fraction: float = 0.05  # a GOOD frequency this far below the reference is drift [-]
    residual_drift_ratio: float = 2.0  # innovation RMS over a wear window / baseline noise std above this: drift
    residual_drift_clear_ratio: float = 1.5  # below this again, the actuator's residual drift is re-armed
    residual_drift_settle_s: float = 10.0  # the estimator's start-up: outputs this soon after the first are not counted
    # an RMS window with less monitored time than this is not judged [s]; None: 5 s, or half the window if shorter
    residual_drift_min_s: float | None = None

    def __post_init__(self) -> None:
        k_v = self.viscous_temperature_coefficient_per_k
        if k_v is not None and not (np.isfinite(k_v) and 0.0 <= k_v <= 0.1):
            raise ConfigurationError(f"viscous_temperature_coefficient_per_k: must lie in [0, 0.1] 1/K, got {k_v!r}")
        if not 0.0 < self.contact_max_fraction <= 1.0:
            raise ConfigurationError(f"contact_max_fraction: must be in (0, 1], got {self.contact_max_fraction!r}")
        if self.contact_hold_outputs < 0:
            raise ConfigurationError(f"contact_hold_outputs: must be >= 0, got {self.contact_hold_outputs!r}")
        if not self.observer_prior_std_ratio >= 1.0:
            raise ConfigurationError(f"observer_prior_std_ratio: must be >= 1, got {self.observer_prior_std_ratio!r}")
        if not 0.0 < self.mode_segment_s <= self.mode_window_s:
            raise ConfigurationError(
                f"mode_segment_s, mode_window_s: need 0 < segment <= window, got {self.mode_segment_s!r}, "
                f"{self.mode_window_s!r}"
            )
        if not 0.0 < self.mode_drift_fraction < 1.0:
            raise ConfigurationError(f"mode_drift_fraction: must be in (0, 1), got {self.mode_drift_fraction!r}")
        if self.mode_reference_estimates < 1:
            raise ConfigurationError(f"mode_reference_estimates: must be >= 1, got {self.mode_reference_estimates!r}")
        if self.residual_drift_min_s is not None and not 0.0 <= self.residual_drift_min_s <= self.wear_window_s:
            raise ConfigurationError(
                f"residual_drift_min_s: must be in [0, wear_window_s = {self.wear_window_s!r}], "
                f"got {self.residual_drift_min_s!r}"
            )
        if not self.residual_drift_settle_s >= 0.0:
            raise ConfigurationError(f"residual_drift_settle_s: must be >= 0, got {self.residual_drift_settle_s!r}")
        if not 0.0 < self.residual_drift_clear_ratio <= self.residual_drift_ratio:
            raise ConfigurationError(
                "residual_drift_clear_ratio, residual_drift_ratio: need 0 < clear <= ratio, got "
                f"{self.residual_drift_clear_ratio!r}, {self.residual_drift_ratio!r}"
            )


def nominal_baseline(description: RobotDescription) -> Baseline:
    """A baseline from the description alone, for a robot not commissioned yet.

    Friction from the description's nominal values (zero where none is declared) with a prior std of
    half their size plus 2 % of the rated effort; noise 0.5 % of the rated effort. Commissioning
    (``shadow commission``) replaces it with measured values.
    """
    drives = description.parameters.drives
    rated = np.array([d.rated_effort for d in drives], dtype=float)
    n = len(drives)
    v_st = description.friction.stribeck_velocity if description.friction is not None else None
    k = 3 if v_st is None else 4
    if description.friction is not None:
        theta_f = description.friction.parameters()
    else:
        theta_f = np.zeros(k * n)
    # N m | N, per (rad/s | m/s), N m | N (and N m | N for the Stribeck level)
    scale = np.repeat(rated, k) * np.tile([0.02, 0.002, 0.02, 0.02][:k], n)
    std = 0.5 * np.abs(theta_f) + scale
    tool = description.tool
    t_ref = None  # the temperature the declared viscous friction holds at, when declared
    if description.friction is not None and description.friction.viscous_reference_temperature_k is not None:
        t_ref = np.full(n, description.friction.viscous_reference_temperature_k)
    if description.family == "delta":
        return Baseline(
            friction_parameters=theta_f,
            friction_covariance=np.diag(std**2),
            noise_std=0.005 * rated,
            tool_mass_kg=tool.tool_mass_kg,  # type: ignore[union-attr]
            work_piece_mass_kg=tool.work_piece_mass_kg,  # type: ignore[union-attr]
            reference_temperature_k=t_ref,
            stribeck_velocity=v_st,
        )
    payload = tool.payload_parameters(gripping=False)  # the fixture; the declared part comes and goes
    return Baseline(
        friction_parameters=theta_f,
        friction_covariance=np.diag(std**2),
        noise_std=0.005 * rated,
        tool_mass_kg=float(payload[0]),
        work_piece_mass_kg=tool.work_piece_mass_kg,
        payload_parameters=payload,
        reference_temperature_k=t_ref,
        stribeck_velocity=v_st,
    )


def with_friction_form(settings: MonitorSettings, stribeck_velocity: float | None) -> MonitorSettings:
    """``settings`` following the friction form of a baseline: with the Stribeck term at ``stribeck_velocity``
    [rad/s | m/s], or without it (None).

    The per-class random walk and resolution get a fourth entry for the Stribeck level, the Coulomb class's
    (both are levels of the same friction curve, in N m | N), or lose it.
    """
    tracker = settings.tracker
    if tracker.stribeck_velocity == stribeck_velocity:
        return settings
    walk = np.asarray(tracker.friction_walk_std, dtype=float)[:3]
    resolution = np.asarray(tracker.friction_resolution, dtype=float)[:3]
    if stribeck_velocity is not None:
        walk, resolution = np.append(walk, walk[0]), np.append(resolution, resolution[0])
    tracker = replace(
        tracker, stribeck_velocity=stribeck_velocity, friction_walk_std=walk, friction_resolution=resolution
    )
    return replace(settings, tracker=tracker)


def default_settings(description: RobotDescription, *, sample_rate_hz: float = 1000.0) -> MonitorSettings:
    """Settings that suit a 1 kHz stream of either family."""
    drives = description.parameters.drives
    n = len(drives)
    delta = description.family == "delta"
    smooth = description.friction.smooth_velocity if description.friction is not None else (0.02 if delta else 2e-4)
    if delta:
        payload_prior, payload_walk, payload_res = [0.5, 0.5], [1e-4, 1e-3], [0.01, 0.01]
    else:  # mass, first moments, inertia about the platform origin
        payload_prior = [2.0] + [0.2] * 3 + [0.05] * 6
        payload_walk = [1e-4] + [1e-5] * 3 + [1e-6] * 6
        payload_res = [0.05] + [0.01] * 3 + [0.005] * 6
    work_piece = description.tool.work_piece_parameters_per_kg() if not delta else None
    if work_piece is not None:  # the part clamped while gripping: its mass, as the delta's work piece
        payload_prior, payload_walk, payload_res = [*payload_prior, 0.5], [*payload_walk, 1e-3], [*payload_res, 0.01]
    rated = float(np.mean([d.rated_effort for d in drives]))
    reported, command_period = declared_effort_timing(drives, 1.0 / sample_rate_hz)
    tracker = TrackerSettings(
        half_window=10,
        poly_order=5,  # exact to degree 5 also off the window's centre, where the efforts' instants lie
        max_gap_s=0.05,
        output_period_s=1.0,
        smooth_velocity=smooth,
        payload_prior_std=np.array(payload_prior),
        payload_walk_std=np.array(payload_walk),
        friction_walk_std=np.array([1e-4, 1e-5, 1e-4]) * rated,
        payload_resolution=np.array(payload_res),
        friction_resolution=np.array([0.01, 0.002, 0.01]) * rated,
        current_loop_bandwidth_hz=np.array([d.current_loop_bandwidth_hz for d in drives]),
        noise_time_constant_s=60.0,
        n_temperatures=n,
        reported_effort=reported,
        command_period_s=command_period,
        identifiability_memory_s=60.0,  # a parameter counts as seen when the last minute or so of motion pins it
        work_piece_per_kg=work_piece,
    )
    settings = MonitorSettings(
        tracker=tracker, sample_rate_hz=sample_rate_hz, wear_reference_speed=1.0 if delta else 0.05
    )
    return with_friction_form(settings, description.friction.stribeck_velocity if description.friction else None)


def calibrated_thresholds(residual: Array, settings: MonitorSettings, *, margin: float = 1.25) -> Array:
    """Collision thresholds from the observer residual of a healthy run (N, n) [N m | N].

    A healthy run's residual is not Gaussian (what the rigid model leaves out comes with the motion), so its
    peaks set the threshold: the level that 1 s blocks of the residual exceed at the configured false-alarm
    rate, shared among the actuators (``p = rate * 1 s / n``), from the Gumbel law fitted to the block maxima
    (:func:`~shadow.detection.momentum_observer.extreme_value_thresholds`). Never below ``margin`` times the
    largest healthy |r| nor the Gaussian bound ``z_(1 - alpha/2) sigma_r``
    (:func:`~shadow.detection.momentum_observer.residual_thresholds`); a run too short for the fit
    (under ``MIN_EXTREME_VALUE_BLOCKS`` seconds) gets those two alone.
    """
    rate_hz = settings.sample_rate_hz
    alpha = alpha_for_false_alarm_rate(settings.false_alarms_per_day / 24.0, rate_hz)
    settle = int(5.0 * rate_hz / settings.observer_gain_per_s)  # five observer time constants
    gaussian = residual_thresholds(residual, alpha, settle_samples=settle)
    peak = np.max(np.abs(residual[settle:]), axis=0)
    thr = np.maximum(gaussian, margin * peak)
    block = max(int(round(rate_hz * EXTREME_VALUE_BLOCK_S)), 1)
    if (residual.shape[0] - settle) // block >= MIN_EXTREME_VALUE_BLOCKS:
        p = settings.false_alarms_per_day / 86400.0 * EXTREME_VALUE_BLOCK_S / residual.shape[1]
        thr = np.maximum(
            thr, extreme_value_thresholds(residual, block_samples=block, exceedance_per_block=p, settle_samples=settle)
        )
    return thr


def collision_thresholds(noise_std: Array, rated: Array, settings: MonitorSettings) -> Array:
    """Per-actuator collision thresholds [N m | N], see the module docstring."""
    dt = 1.0 / settings.sample_rate_hz
    a = np.exp(-settings.observer_gain_per_s * dt)
    sigma_r = noise_std * np.sqrt((1.0 - a) / (1.0 + a))  # AR(1) std of the observer residual
    alpha = alpha_for_false_alarm_rate(settings.false_alarms_per_day / 24.0, settings.sample_rate_hz)
    z = float(norm.isf(alpha / 2.0))  # two-sided Gaussian quantile
    return z * sigma_r + settings.threshold_floor_rated_fraction * rated


class RobotMonitor:
    """Follows one robot; :meth:`process` takes its batches in sequence order."""

    def __init__(
        self,
        robot_id: str,
        description: RobotDescription,
        baseline: Baseline | None = None,
        settings: MonitorSettings | None = None,
    ) -> None:
        self.robot_id = robot_id
        self.description = description
        self.model = build_model(description)
        self.baseline = baseline if baseline is not None else nominal_baseline(description)
        # the baseline fixes the friction form (with or without the Stribeck term) the tracker follows
        settings = settings if settings is not None else default_settings(description)
        self.settings = with_friction_form(settings, self.baseline.stribeck_velocity)
        self.tracker = PayloadFrictionTracker(self.model, self.settings.tracker, self.baseline)
        drives = description.parameters.drives
        self.n = len(drives)
        self.rated = np.array([d.rated_effort for d in drives], dtype=float)
        K_O = np.full(self.n, self.settings.observer_gain_per_s)
        if self.baseline.collision_threshold is not None:  # calibrated on the healthy run (shadow commission)
            self.thresholds = np.asarray(self.baseline.collision_threshold, dtype=float)
        else:
            self.thresholds = collision_thresholds(self.baseline.noise_std, self.rated, self.settings)
        self.residual_log: list[Array] | None = None  # set to [] to keep every observer residual (calibration)
        self.collisions = CollisionMonitor(
            K_O,
            CollisionSettings(
                threshold=self.thresholds,
                rated_effort=self.rated,
                evidence_before_s=self.settings.evidence_before_s,
                evidence_after_s=self.settings.evidence_after_s,
            ),
            jacobian=self.model.platform_jacobian,
        )
        self.delta = description.family == "delta"
        self.position_unit = PositionUnit.RAD if self.delta else PositionUnit.M
        self._raw = _RawBuffer(self.n)
        self._pending_events: list[CollisionEvent] = []
        self._recent_collisions: list[CollisionEvent] = []
        self._last_seq = 0
        self._transfer = np.zeros((0, 3 + self.n))  # open transfer per sample: t, Y^T W z, Y^T W Y, |Y_p|
        self._transfer_open = False
        # the filter state before the output in which the open transfer began (None: not known), and that output's
        # first sample time [s]: the transfer is weighed against it, and a faulty one is undone back to it
        self._transfer_before: FilterState | None = None
        self._transfer_before_t_s = np.nan
        self._rolled_back = False  # a faulty transfer undid the filter's update in this output
        # per sample of the open transfer: y^T W H, the pull of every filter parameter on its weighed mass (p_x,)
        self._pull_width = 0 if self.delta else len(self.tracker.parameter_names)  # the delta's gate needs none
        self._transfer_pull = np.zeros((0, self._pull_width))
        self._settled = False  # the tool mass has once been known well enough to judge transfers
        self._empty = np.zeros((0, 3 + self.n))  # open empty move (tool not gripping), same columns
        # a declared work piece the tool state switches: the delta's picked item, the hexapod's clamped part
        self._work_index = self.tracker.work_piece_index
        if self._work_index is not None:
            tool = description.tool
            self._expected_piece_kg = float(tool.work_piece_mass_kg)  # type: ignore[union-attr]
            # the spread is floored at a quarter of the smallest step: a learning phase of very alike stretches
            # must not make the watch read every later gram as a change
            # (a description without a tolerance gets 5 % of the piece; the smallest step is 1 g either way)
            piece_kg = float(tool.work_piece_mass_kg)
            piece_step = float(tool.work_piece_tolerance_kg) or 0.05 * piece_kg
            piece_step = max(piece_step, 1e-3)
            carrier_kg = float(tool.tool_mass_kg) if isinstance(tool, DeltaTool) else float(tool.payload.mass_kg)
            tool_step = max(self.settings.tool_step_fraction * carrier_kg, 1e-3)
            self._piece_steps = MassStepWatch(MassStepSettings(min_step_kg=piece_step, spread_floor_kg=piece_step / 4))
            self._tool_steps = MassStepWatch(MassStepSettings(min_step_kg=tool_step, spread_floor_kg=tool_step / 4))
        # wear window being filled: [window index, outputs, sum F_c (n), sum b (n), sum T (n), T samples (n)]
        self._wear_acc = np.concatenate([[-1.0, 0.0], np.zeros(4 * self.n)])
        self._wear: WearMonitor | None = None  # built at the first complete window
        self._wear_t_ref = np.full(self.n, np.nan)  # (n,) T_ref of the compensation [K]; NaN: not known yet
        self._wear_trends: list[Any] = []
        self._x_prior = np.zeros(0)  # filter estimate before the current output (not yet pulled by it)
        self._contact_holds = 0  # outputs in a row whose update was undone for a contact in them
        self._last_output_s = np.array([np.nan, np.nan])  # first and last sample time of the previous output [s]
        self._observer_last: _CarriedSample | None = None  # the observer's last sample, to re-base its momentum
        self._std_prior = np.zeros(0)
        self._welch: WelchAccumulator | None = None  # built at the first output (its sample period)
        self._mode_reference = np.zeros((0, 2))  # first GOOD estimates: frequency [Hz], damping ratio
        self._mode_alarmed = False
        # residual RMS window being filled: [window index, samples, first t, last t, sum r^2 (n)]
        self._rms_acc = np.concatenate([[-1.0, 0.0, np.nan, np.nan], np.zeros(self.n)])
        self._rms_alarmed = np.zeros(self.n, dtype=bool)
        self._rms_explained = False  # the open RMS window held a contact or a payload fault
        self._first_output_s = np.nan  # start of the monitor's first output (the estimator's start-up)

    # ---------------------------------------------------------------- processing
    def process(self, batch: SampleBatch) -> StepResults:
        """Rows produced by one batch (possibly none until an output period completes)."""
        return self.process_many([batch])

    def process_many(self, batches: list[SampleBatch]) -> StepResults:
        """Rows produced by consecutive batches, processed as one block.

        The estimator's cost is mostly per call, so the service hands over all batches that arrived
        together (a 10 ms message at 1 kHz holds only 10 samples). Batches whose optional signals
        differ are processed one after the other.
        """
        snapshot = self.save_state()
        results = StepResults(self.robot_id)
        try:
            for group in _same_layout_runs(batches):
                results.extend(self._process_block(group))
        except ShadowError:
            self.restore_state(snapshot)  # all or nothing, so the caller may retry batch by batch
            raise
        return results

    def _process_block(self, batches: list[SampleBatch]) -> StepResults:
        drives = self.description.parameters.drives
        t = np.concatenate([b.t for b in batches])
        q = np.concatenate([b.q for b in batches])
        effort = np.concatenate(
            [b.effort if b.effort is not None else effort_from_current(b.current, drives) for b in batches]
        )
        first = batches[0]
        gripping = None if first.gripping is None else np.concatenate([b.gripping for b in batches])  # type: ignore[misc]
        temperature = (
            None if first.temperature_k is None else np.concatenate([b.temperature_k for b in batches])  # type: ignore[misc]
        )
        self._raw.append(t, q, effort, gripping)
        self._last_seq = batches[-1].seq
        results = StepResults(self.robot_id)
        # cut at the output-period boundaries, so that each tracker call completes at most one output and the
        # filter state before it is known (the observer's estimate, and what a contact's output is rolled back to)
        period = np.floor(t / self.settings.tracker.output_period_s)
        cuts = [0, *(np.flatnonzero(np.diff(period)) + 1).tolist(), t.shape[0]]
        for a, b in zip(cuts[:-1], cuts[1:], strict=True):
            before = self.tracker.filter.state
            outputs = self.tracker.process(
                t[a:b],
                q[a:b],
                effort[a:b],
                tool_gripping=None if gripping is None else gripping[a:b],
                temperatures=None if temperature is None else temperature[a:b],
            )
            for out in outputs:
                self._rows_for(out, results, before if len(outputs) == 1 else None)
        self._raw.trim(float(t[-1]) - self._raw_keep_s())
        return results

    def _raw_keep_s(self) -> float:
        s = self.settings
        return s.evidence_before_s + s.evidence_after_s + 2 * s.tracker.output_period_s + 10.0

    def _theta_p(self, x: Array, gripping: Array) -> Array:
        """Payload parameters per sample (K, p) from the filter state: the tool or fixture, plus the work piece while
        gripping."""
        return self.tracker.payload_per_sample(x, gripping)

    def _rows_for(self, out: TrackerOutput, results: StepResults, before: FilterState | None = None) -> None:
        """Every row of one output; ``before`` is the filter state before this output's update (None: unknown)."""
        t_end = float(out.t[-1])
        x_obs = None if before is None else self._observer_estimate(out, before)
        self._last_output_s = np.array([out.t[0], t_end])
        saved = (self.collisions.save(), list(self._pending_events), self._residual_log_length(), self._observer_last)
        contact = self._collisions_for(out, x_obs)
        if contact and x_obs is None and before is not None:
            # a contact seen through the posterior, which it has pulled: the observer runs again over this output
            # with the estimate from before it (less certain after a pause, but not fitted to the contact)
            self.collisions.restore(saved[0])
            self._pending_events = saved[1]
            self._observer_last = saved[3]
            if self.residual_log is not None:
                del self.residual_log[saved[2] :]
            contact = self._collisions_for(out, before.x)
        if contact and before is not None and self._contact_holds < self.settings.contact_hold_outputs:
            out = self._hold_estimator(out, before)
            self._contact_holds += 1
        else:
            self._contact_holds = 0
        for name, value, std, ok in zip(out.parameter_names, out.x, out.std, out.identifiable, strict=True):
            results.estimates.append(
                {"time_s": t_end, "parameter": name, "value": float(value), "std": float(std), "identifiable": bool(ok)}
            )
        innovation = out.prior_residual
        rms = np.sqrt(np.mean(innovation**2, axis=0))
        peak = np.max(np.abs(innovation), axis=0)
        nis_per_dof = out.nis / out.dof if out.dof else float("nan")
        for i in range(self.n):
            results.residual_aggregates.append(
                {
                    "time_s": float(out.t[0]),
                    "actuator": i + 1,  # 1-based, as in the parameter names
                    "window_s": float(out.t[-1] - out.t[0]),
                    "n_samples": out.n_samples,
                    "rms": float(rms[i]),
                    "peak": float(peak[i]),
                    "nis": float(nis_per_dof),
                }
            )
        for restart in out.restarts:
            results.unmonitored.append(
                {
                    "start_s": restart.t_s - max(restart.gap_s, 0.0),
                    "end_s": restart.t_s,
                    "cause": "conditioning_restart",
                    "detail": f"{restart.reason}: step of {restart.gap_s:.3f} s",
                }
            )
        if self._work_index is not None:
            # judge transfers against the estimate from before this output, so that an odd transfer has not
            # yet pulled the tool mass and friction toward itself
            # settled once the tool mass has been known well; a pause in the stream widens the filter's std by its
            # random walk, but is no evidence against the estimate, so it does not unsettle it (the tool's step watch
            # on the empty moves catches a tool changed during the pause)
            # (missed and double picks are judged then; the fine checks wait until the filter has settled again)
            known = self._x_prior.shape == out.x.shape
            # (the hexapod's transfers are gated one by one instead, on their mass's std from the whole estimate)
            fine = known and (not self.delta or self._std_prior[0] <= self._settled_tool_std_kg())
            self._settled = self._settled or fine
            settled = known and self._settled
            n_events = len(results.events)
            self._rolled_back = False
            self._transfers_for(
                out, self._x_prior if settled else out.x, results, judge=settled, fine=fine, before=before
            )
            # a transfer judged faulty in this output explains its residual as the wrong mass does
            contact = contact or any(e["kind"] == "payload_fault" for e in results.events[n_events:])
        if self._rolled_back:  # the next output starts from the state the faulty transfer was undone to
            state = self.tracker.filter.state
            self._x_prior, self._std_prior = state.x.copy(), np.sqrt(np.diag(state.P))
        else:
            self._x_prior, self._std_prior = out.x.copy(), out.std.copy()
        self._wear_for(out, t_end, results)
        self._mode_for(out, results)
        self._residual_drift_for(out, rms, results, explained=bool(contact))
        self._release_events(t_end, results)
        self._health_for(out, rms, t_end, results)

    def _residual_log_length(self) -> int:
        return 0 if self.residual_log is None else len(self.residual_log)

    def _observer_estimate(self, out: TrackerOutput, before: FilterState) -> Array | None:
        """The filter's estimate before this output, for the observer, unless this output taught the filter much more
        than it knew (None: take the posterior): after a pause its random walk has widened the prior, and the first
        outputs re-learn. The test: the prior std propagated to this output, ``sqrt(P_ii + q_i T)``, over the
        posterior std, at most ``observer_prior_std_ratio`` for every parameter."""
        t_prev = self._last_output_s[1]
        if not np.isfinite(t_prev):
            return None
        span = max(float(out.t[-1]) - float(t_prev), 0.0)
        prior_std = np.sqrt(np.diag(before.P) + self.tracker.filter.model.q_rate * span)
        ratio = prior_std / np.maximum(out.std, 1e-300)
        return before.x if float(np.max(ratio)) <= self.settings.observer_prior_std_ratio else None

    def _hold_estimator(self, out: TrackerOutput, before: FilterState) -> TrackerOutput:
        """Undo the update of an output with a contact in it: the filter goes back to its state before the output,
        propagated over the output's span (``P = P + Q T``), so an impact's force is not learnt as friction or
        payload (nor its residual as noise). The output is reported with that state, as not identifying anything."""
        span = float(out.t[-1] - out.t[0]) + (float(np.median(np.diff(out.t))) if out.t.shape[0] > 1 else 0.0)
        state = predict(before, self.tracker.filter.model, span)
        self.tracker.filter.state = state
        std = np.sqrt(np.diag(state.P))
        return replace(out, x=state.x.copy(), std=std, identifiable=np.zeros_like(out.identifiable))

    def _collisions_for(self, out: TrackerOutput, x_prior: Array | None = None) -> bool:
        """Run the observer over the output; True when a contact shows in it (see ``contact_max_fraction``).

        The friction and payload the observer takes off are ``x_prior``, the filter's estimate before this output,
        when given: the posterior has been fitted to these very samples, and a contact pulls it (its offset and
        Coulomb terms absorb part of the force), which would show as residual before the contact's onset."""
        n_pay = self.tracker.n_payload
        x = out.x if x_prior is None else x_prior
        x_f = x[n_pay:]
        tau_f = friction_effort(
            out.qd,
            x_f,
            smooth_velocity=self.settings.tracker.smooth_velocity,
            stribeck_velocity=self.settings.tracker.stribeck_velocity,
        )
        # the mass matrix and bias at each sample's own payload (the work piece comes and goes); the observer's
        # carried sample goes first, to re-base its momentum on this estimate (see _rebase_observer)
        last = self._observer_last if self.collisions.observer.save() is not None else None
        q, qd, gripping = out.q, out.qd, out.gripping
        if last is not None:
            q, qd = np.vstack([last.q, q]), np.vstack([last.qd, qd])
            gripping = np.concatenate([[last.gripping], gripping])
        M, beta = _observer_terms(self, q, qd, self._theta_p(x, gripping))
        if last is not None:
            self._rebase_observer(M[0] @ last.qd)
            M, beta = M[1:], beta[1:]
        tau = out.effort - tau_f
        # a conditioning restart (gap in the stream) breaks the momentum integral: the robot moved while
        # nobody watched, so the observer starts afresh there instead of reading the jump as a collision
        restart_at = {int(np.searchsorted(out.t, r.t_s)) for r in out.restarts}
        cuts = sorted({0, out.t.shape[0], *restart_at})
        above = np.zeros(out.t.shape[0], dtype=bool)
        for a, b in zip(cuts[:-1], cuts[1:], strict=True):
            if a in restart_at:
                self.collisions.observer.restore(None)
            s = slice(a, b)
            r, events = self.collisions.update(out.t[s], tau[s], M[s], beta[s], out.qd[s], out.q[s])
            self._pending_events.extend(events)
            above[s] = np.max(np.abs(r) / self.thresholds, axis=1) > 1.0
            if self.residual_log is not None:
                self.residual_log.append(r)
        self._observer_last = _CarriedSample(out.q[-1].copy(), out.qd[-1].copy(), bool(out.gripping[-1]))
        cs = self.collisions.settings
        starts, ends = find_runs(out.t, above, cs.merge_gap_s)
        long_enough = bool(np.any(out.t[ends] - out.t[starts] >= cs.min_duration_s)) if starts.size else False
        return long_enough and float(above.mean()) <= self.settings.contact_max_fraction

    def _rebase_observer(self, momentum: Array) -> None:
        """Give the observer's carried sample its ``momentum`` (n,) under this output's payload estimate.

        The observer's residual follows dp/dt with p = M(q, theta) qd (module docstring of
        :mod:`shadow.detection.momentum_observer`). Its carried momentum was computed under the previous output's
        payload estimate; when that estimate moves, the first difference across the boundary would read
        ``dM qd / dt`` as a torque pulse: on the delta at 3 m/s, 15 g less work piece make a 0.7 N m residual step
        at K_O = 50 1/s, a collision alarm in plain production. The carried momentum is recomputed under the new
        estimate instead, as if it had held since that sample (its tau - beta moves by the friction's and
        weight's change only, a thousandth of that after the observer's weighting, and stays).
        """
        state = self.collisions.observer.save()
        if state is not None:
            self.collisions.observer.restore(replace(state, p=np.asarray(momentum, dtype=float).copy()))

    def _settled_tool_std_kg(self) -> float:
        """Transfers are judged once the tool mass is known this well (a quarter of the work piece's tolerance)."""
        return 0.25 * float(self.description.tool.work_piece_tolerance_kg)  # type: ignore[union-attr]

    def _transfers_for(
        self,
        out: TrackerOutput,
        x: Array,
        results: StepResults,
        *,
        judge: bool,
        fine: bool = True,
        before: FilterState | None = None,
    ) -> None:
        """Follow the open transfer through this output and judge every transfer that ended in it.

        ``x`` is the filter estimate the empty moves are weighed against; until the estimator has settled
        (``judge`` False) transfers are followed but not judged; while it is not settled now (``fine`` False, e.g.
        after a pause) only missed and double picks are judged, and neither the work piece nor the tool is weighed
        for a change. ``before`` is the filter state before this output's update (None: not known).

        The hexapod's part is weighed, over all its samples, against the filter state from before the output it began
        in (none of its samples has pulled that state; a transfer that began in an earlier output would otherwise be
        weighed partly against an estimate its own first samples had already moved). A part judged faulty is
        undone: the filter goes back to that state, propagated to the end of this output (``P + Q T``), so that an
        empty clamp or a double pick is not learnt as friction, offsets or a lighter part (on the hexapod, whose
        part's column is nearly that of the leg offsets at small motions, the next part was otherwise weighed
        0.27 kg off)."""
        n_pay = self.tracker.n_payload
        j = self._work_index
        assert j is not None and self.tracker.work_piece_per_kg is not None
        y = out.Y_payload @ self.tracker.work_piece_per_kg  # (K, n) work-piece column Y_p w (delta: Y_p)
        w = 1.0 / np.maximum(out.noise_std, 1e-12) ** 2  # W = diag(1 / sigma^2)
        Y_f = friction_regressor(  # built once: every estimate's friction effort below is Y_f theta_f
            out.qd,
            smooth_velocity=self.settings.tracker.smooth_velocity,
            stribeck_velocity=self.settings.tracker.stribeck_velocity,
        )

        def terms_at(xv: Array) -> Array:
            """Per sample: t, Y^T W z, Y^T W Y, |Y_p| with z what the carried mass must explain at estimate xv."""
            tau_f = np.einsum("Nij,j->Ni", Y_f, xv[n_pay:])  # friction_effort's own product
            carried = np.einsum("kap,p->ka", out.Y_payload, xv[:j])  # the tool's (fixture's) own effort
            z = out.effort - out.tau_known - carried - tau_f
            return np.column_stack([out.t, np.sum(y * w * z, axis=1), np.sum(y * w * y, axis=1), np.abs(y)])

        # y^T W H per sample: z above is linear in every other parameter (the fixture's along Y_p, friction along
        # Y_f), so the weighed mass moves by -sum(y^T W H) dx / sum(y^T W y) when the estimate moves by dx
        pull = np.zeros((y.shape[0], 0))
        if self._pull_width:
            yw = y * w
            pull = np.concatenate(
                [np.einsum("ka,kap->kp", yw, out.Y_payload[:, :, :j]), np.zeros((y.shape[0], n_pay - j)),
                 np.einsum("ka,kab->kb", yw, Y_f)],
                axis=1,
            )  # fmt: skip
        terms = terms_at(x)
        grip = out.gripping > 0.5
        was_open = self._transfer.shape[0] > 0 or self._transfer_open
        if not was_open:  # a transfer that begins in this output is weighed against the state before it
            self._transfer_before, self._transfer_before_t_s = before, float(out.t[0])
        # (the hexapod's only: the delta's tool and step watches are tuned to weighing against x; not re-measured)
        open_before = self._transfer_before if judge and not self.delta else None
        transfer_terms = terms if open_before is None else terms_at(open_before.x)
        x_transfer = x if open_before is None else open_before.x
        edges = np.flatnonzero(np.diff(np.concatenate([[was_open], grip]).astype(np.int8)))  # tool-state changes
        a, state = 0, was_open
        for e in [*edges, out.t.shape[0]]:  # loop over tool-state changes, each run taken in bulk
            if state:  # samples a..e-1 belong to the open transfer
                self._transfer = np.concatenate([self._transfer, transfer_terms[a:e]])
                self._transfer_pull = np.concatenate([self._transfer_pull, pull[a:e]])
                if e < out.t.shape[0]:  # the tool let go at sample e: the transfer is complete
                    if judge and self._transfer.shape[0]:
                        faulty = self._judge_transfer(
                            self._transfer,
                            float(x_transfer[j]),
                            results,
                            fine=fine,
                            pull=self._transfer_pull,
                            covariance=None if open_before is None else open_before.P,
                        )
                        if faulty and open_before is not None:
                            self._undo_since(open_before, self._transfer_before_t_s, float(out.t[-1]))
                    self._transfer = np.zeros((0, 3 + self.n))
                    self._transfer_pull = np.zeros((0, pull.shape[1]))
                    # the next transfer, if it begins in this output: before this output, or what it was undone to
                    if self._rolled_back:
                        self._transfer_before, self._transfer_before_t_s = self.tracker.filter.state, float(out.t[-1])
                    else:
                        self._transfer_before, self._transfer_before_t_s = before, float(out.t[0])
            else:  # an empty move: on it the same terms weigh the tool alone, as a deviation from x[0]
                self._empty = np.concatenate([self._empty, terms[a:e]])
                if e < out.t.shape[0]:  # the tool closed at sample e
                    # (the delta's tool is one mass on the work piece's column; a hexapod fixture's ten parameters
                    # are not weighed along its part's column)
                    if judge and fine and self._empty.shape[0] and self.delta:
                        self._weigh_tool(self._empty, float(x[0]), results)
                    self._empty = np.zeros((0, 3 + self.n))
            state = not state if e < out.t.shape[0] else state
            a = e
        self._transfer_open = bool(state)

    def _undo_since(self, state: FilterState, from_s: float, to_s: float) -> None:
        """Put the filter back to ``state`` (taken at ``from_s``), propagated over the span to ``to_s`` [s]."""
        self.tracker.filter.state = predict(state, self.tracker.filter.model, max(to_s - from_s, 0.0))
        self._rolled_back = True

    def _judge_transfer(
        self,
        terms: Array,
        assumed_kg: float,
        results: StepResults,
        *,
        fine: bool = True,
        pull: Array | None = None,
        covariance: Array | None = None,
    ) -> bool:
        """Judge one transfer from its per-sample terms (K, 3 + n): t, Y^T W z, Y^T W Y, |Y_p| per actuator; True
        when it is a payload fault.

        The hexapod's transfers are judged by how well the filter state they are weighed against pins their mass:
        with ``pull`` (K, p_x), each sample's y^T W H, and the ``covariance`` P of that state, the weighed mass's
        std from the estimate is ``sqrt(g^T P g)``, ``g = sum y^T W H / sum y^T W y`` (first-order propagation).
        The fine checks need it within a quarter of the part's tolerance, missed and double picks within a tenth
        of the part's mass; the ten fixture parameters are then known well enough along the part's column, however
        uncertain each is alone. (The delta's gate is the tool mass's own std: one mass on the same column.)

        The observer ran with the filter's work-piece mass ``assumed_kg``, so a wrong carried mass shows there as an
        external effort of at most ``|m - assumed| max |Y_p|`` per actuator (plus its threshold) for the whole
        transfer: a missed or double pick is seen by the observer too. So the mass is weighed first on every sample
        of the transfer; the collisions inside it that this mass explains (peak within 1.5 times that bound) are
        the mass's own effect, the others are contacts, and the samples around those are left out and the mass
        weighed again (an impact's force is not the work piece's weight). If the transfer is a payload fault, the
        collisions its mass explains are folded into it; larger ones stay collisions.
        """
        s = self.settings
        j_work = self._work_index
        t = terms[:, 0]
        start, end = float(t[0]), float(t[-1])
        if end - start < s.min_transfer_s:
            return False
        s_yy_all = float(terms[:, 2].sum())
        if s_yy_all <= 0.0:
            return False
        y_max = terms[:, 3:].max(axis=0)
        inside = [c for c in self._pending_events if c.start_time_s <= end + 0.05 and c.end_time_s >= start - 0.05]
        m_all = float(terms[:, 1].sum()) / s_yy_all  # weighed on every sample
        contacts = [c for c in inside if not self._explained_by_mass(c, m_all, assumed_kg, y_max, end - start)]
        keep = np.ones(t.shape[0], dtype=bool)
        for c in contacts:
            keep &= ~((t >= c.start_time_s - 0.02) & (t <= c.end_time_s + 0.05))
        s_yz, s_yy = float(terms[keep, 1].sum()), float(terms[keep, 2].sum())
        if s_yy <= 0.0 or keep.sum() < 0.25 * t.shape[0]:
            return False  # too little of the transfer left to weigh the work piece
        count = int(keep.sum())
        tool = self.description.tool
        expected = self._expected_piece_kg  # the described work piece, or the new one after a reported change
        tolerance = float(tool.work_piece_tolerance_kg)  # type: ignore[union-attr]
        if not self.delta:
            if pull is None or covariance is None:
                return False  # the state the transfer was weighed against is not known: no judgement
            g = pull[keep].sum(axis=0) / s_yy
            from_estimate_kg = float(np.sqrt(max(g @ covariance @ g, 0.0)))
            if not from_estimate_kg <= 0.1 * expected:  # NaN too (a checkpoint that did not keep the pull)
                return False
            fine = fine and from_estimate_kg <= 0.25 * tolerance
        m = s_yz / s_yy  # weighted least squares of the carried mass
        std = 1.0 / np.sqrt(s_yy)
        ratio = m / expected if expected > 0 else np.inf
        results.estimates.append(  # every transfer's own mass, beside the filter's running estimates
            {"time_s": end, "parameter": "transfer_mass", "value": float(m), "std": float(std), "identifiable": True}
        )
        # one work piece, right or wrong: watch its mass; not while the tool's own mass may have changed (a heavier
        # gripper looks like a heavier work piece until the empty moves have confirmed it)
        if fine and s.missed_pick_ratio <= ratio <= s.double_pick_ratio and not self._tool_steps.alarmed:
            step = self._piece_steps.push(start, end, float(m), float(std))
            if step is not None:
                self._report_mass_step("work_piece", step, j_work, results)
                expected = self._expected_piece_kg  # this transfer is judged against the new mass too
                ratio = m / expected if expected > 0 else np.inf
        if ratio < s.missed_pick_ratio:
            fault = "missed_pick"
            words = "the tool closed but carried nothing" if self.delta else "the fixture clamped but held no part"
        elif ratio > s.double_pick_ratio:
            fault = "double_pick"
            words = "the tool carried about two work pieces" if self.delta else "the fixture held about twice the part"
        elif fine and abs(m - expected) > tolerance + 3.0 * self._transfer_scatter_kg(float(std)):
            fault = "wrong_work_piece"
            words = "the carried mass is outside the " + ("work piece's" if self.delta else "part's") + " tolerance"
        else:
            return False
        explained = [c for c in inside if self._explained_by_mass(c, m, assumed_kg, y_max, end - start)]
        self._pending_events = [c for c in self._pending_events if all(c is not e for e in explained)]
        results.events.append(
            {
                "kind": "payload_fault",
                "start_s": start,
                "end_s": end,
                "severity": "medium",
                "summary": (
                    f"{fault.replace('_', ' ')}: {words} ({m:.3f} kg, expected {expected:.3f} +- {tolerance:.3f} kg)"
                ),
                "figures": {
                    "fault": fault,
                    "carried_mass_kg": float(m),
                    "carried_mass_std_kg": float(std),
                    "expected_mass_kg": expected,
                    "tolerance_kg": tolerance,
                    "samples_count": count,
                    "observer_alarms_explained_count": len(explained),
                },
                "evidence_start_s": start,
                "evidence_end_s": end,
                "evidence": None,
                "source_seq": self._last_seq,
            }
        )
        return True

    def _transfer_scatter_kg(self, std_kg: float) -> float:
        """Std of one transfer's mass [kg]: its least-squares std (effort noise alone) combined with the scatter the
        work piece's step watch learnt from alike transfers (what the model leaves out: friction that moves with the
        temperature, the unmodelled Stribeck hump), ``sqrt(std^2 + spread^2)``; the std alone while it learns."""
        spread = self._piece_steps.spread_kg
        return float(np.hypot(std_kg, spread)) if np.isfinite(spread) else std_kg

    def _explained_by_mass(
        self, c: CollisionEvent, m_kg: float, assumed_kg: float, y_max: Array, transfer_s: float
    ) -> bool:
        """A collision inside a transfer that a carried mass ``m_kg`` (instead of ``assumed_kg``) explains: its peak
        residual within 1.5 times ``|m - assumed| max |Y_p| + threshold`` on every actuator [N m | N], or lasting at
        least half the transfer (a wrong mass acts for the whole transfer, an impact is brief)."""
        if c.duration_s >= 0.5 * transfer_s:
            return True
        explainable = np.abs(m_kg - assumed_kg) * y_max + self.thresholds
        return bool(np.all(np.abs(c.peak_residual) <= 1.5 * explainable))

    def _weigh_tool(self, terms: Array, x_tool_kg: float, results: StepResults) -> None:
        """The tool's mass from one empty move alone (``x_tool + sum Y^T W z / sum Y^T W Y`` on the same terms as a
        transfer), for the tool's step watch; moves with a collision in them, or too short, are not weighed."""
        t = terms[:, 0]
        start, end = float(t[0]), float(t[-1])
        if end - start < self.settings.min_transfer_s:
            return
        if any(c.start_time_s <= end + 0.05 and c.end_time_s >= start - 0.05 for c in self._pending_events):
            return
        s_yz, s_yy = float(terms[:, 1].sum()), float(terms[:, 2].sum())
        if s_yy <= 0.0:
            return
        step = self._tool_steps.push(start, end, x_tool_kg + s_yz / s_yy, 1.0 / np.sqrt(s_yy))
        if step is not None:
            self._report_mass_step("tool", step, 0, results)

    def _report_mass_step(self, part: str, step: MassStep, index: int, results: StepResults) -> None:
        """A payload change event, and the filter told: its estimate moves by the step, with the step's uncertainty."""
        state = self.tracker.filter.state
        half = 0.5 * (step.interval_after_kg[1] - step.interval_after_kg[0])
        std = half / 1.96
        self.tracker.filter.state = reset_parameter(state, index, float(state.x[index]) + step.step_kg, std)
        self.tracker.reset_information(index, 1.0 / std**2)  # what the step's stretches measured, no more
        tool = self.description.tool
        if part == "tool":
            self._piece_steps.forget_since(step.onset_time_s)  # transfers since then carried the tool's step too
        if part == "work_piece":
            self._expected_piece_kg = step.mass_after_kg
            described = float(tool.work_piece_mass_kg)  # type: ignore[union-attr]
            tolerance = float(tool.work_piece_tolerance_kg)  # type: ignore[union-attr]
            versus = f"described {described:.3f} +- {tolerance:.3f} kg"
            what = "work piece"
        else:
            described = float(tool.tool_mass_kg)  # type: ignore[union-attr]
            versus = f"described {described:.3f} kg"
            what = "tool (gripper)"
        b_lo, b_hi = step.interval_before_kg
        a_lo, a_hi = step.interval_after_kg
        results.events.append(
            {
                "kind": "payload_change",
                "start_s": step.onset_time_s,
                "end_s": step.alarm_time_s,
                "severity": "medium",
                "summary": (
                    f"{what} mass changed from {step.mass_before_kg:.3f} to {step.mass_after_kg:.3f} kg "
                    f"({versus}); the estimator was told"
                ),
                "figures": {
                    "part": part,
                    "mass_before_kg": step.mass_before_kg,
                    "mass_before_low_kg": b_lo,
                    "mass_before_high_kg": b_hi,
                    "mass_after_kg": step.mass_after_kg,
                    "mass_after_low_kg": a_lo,
                    "mass_after_high_kg": a_hi,
                    "described_mass_kg": described,
                    "stretches_before_count": step.stretches_before,
                    "stretches_after_count": step.stretches_after,
                },
                "evidence_start_s": step.onset_time_s,
                "evidence_end_s": step.alarm_time_s,
                "evidence": None,
                "source_seq": self._last_seq,
            }
        )

    def _wear_for(self, out: TrackerOutput, t_end: float, results: StepResults) -> None:
        """Add this output's friction to the wear window; close the window when the output is past it."""
        n, k = self.n, self.tracker.friction_per_actuator
        x_f = out.x[self.tracker.n_payload :].reshape(n, k)  # per actuator: Coulomb, viscous, offset(, Stribeck)
        index = float(np.floor(t_end / self.settings.wear_window_s))
        acc = self._wear_acc
        if acc[0] >= 0 and index != acc[0] and acc[1] > 0:
            self._close_wear_window(acc, results)
            acc = np.concatenate([[-1.0, 0.0], np.zeros(4 * n)])
        acc[0] = index
        acc[1] += 1
        acc[2 : 2 + n] += x_f[:, 0]
        acc[2 + n : 2 + 2 * n] += x_f[:, 1]
        temp = out.temperature_mean[:n] if out.temperature_mean.shape[0] >= n else np.full(n, np.nan)
        seen = np.isfinite(temp)
        acc[2 + 2 * n : 2 + 3 * n] += np.where(seen, temp, 0.0)
        acc[2 + 3 * n : 2 + 4 * n] += seen
        self._wear_acc = acc

    def viscous_temperature_coefficients(self) -> Array:
        """k (n,) [1/K] of the wear indicator's compensation: the setting if given, else the baseline's identified
        coefficient, else the description's declared one, else 0 (no compensation)."""
        n = self.n
        if self.settings.viscous_temperature_coefficient_per_k is not None:
            return np.full(n, float(self.settings.viscous_temperature_coefficient_per_k))
        k = np.zeros(n)
        f = self.description.friction
        if f is not None and f.viscous_temperature_coefficient_per_k is not None:
            k = np.asarray(f.viscous_temperature_coefficient_per_k, dtype=float).copy()
        identified = self.baseline.viscous_temperature_coefficient_per_k
        if identified is not None:
            k = np.where(np.isfinite(identified), identified, k)
        return k

    def _wear_baseline(self) -> FrictionBaseline | None:
        """The wear indicator's baseline: the baseline's friction at T_ref (NaN entries: no compensation)."""
        n = self.n
        theta_f = self.baseline.friction_parameters.reshape(n, -1)
        v_ref = np.full(n, self.settings.wear_reference_speed)
        if np.any(theta_f[:, 0] + theta_f[:, 1] * v_ref <= 0.0):
            return None
        t_ref = np.where(np.isfinite(self._wear_t_ref), self._wear_t_ref, 0.0)  # unknown: T is set to it (dT = 0)
        return FrictionBaseline(
            theta_f[:, 0].copy(),
            theta_f[:, 1].copy(),
            v_ref,
            TemperatureModel(TemperatureLaw.EXPONENTIAL, np.zeros(n), t_ref),
            TemperatureModel(TemperatureLaw.EXPONENTIAL, self.viscous_temperature_coefficients(), t_ref),
        )

    def _build_wear(self) -> WearMonitor | None:
        """The wear monitor against the baseline's friction at T_ref (:meth:`_wear_baseline`)."""
        base = self._wear_baseline()
        return None if base is None else WearMonitor(base, self.settings.wear_levels)

    def _close_wear_window(self, acc: Array, results: StepResults) -> None:
        n = self.n
        count = acc[1]
        F_c = acc[2 : 2 + n] / count
        b = acc[2 + n : 2 + 2 * n] / count
        t_count = acc[2 + 3 * n : 2 + 4 * n]
        T = np.where(t_count > 0, acc[2 + 2 * n : 2 + 3 * n] / np.maximum(t_count, 1), np.nan)  # NaN: none seen
        day = (acc[0] + 0.5) * self.settings.wear_window_s / 86400.0  # window centre [days since the epoch]
        learn = ~np.isfinite(self._wear_t_ref) & np.isfinite(T)
        if self._wear is None or learn.any():
            # T_ref: the baseline's (commissioning) temperature where known, else the first window's that has one
            known = self.baseline.reference_temperature_k
            first = np.where(np.isfinite(self._wear_t_ref), self._wear_t_ref, T)
            self._wear_t_ref = first if known is None else np.where(np.isfinite(known), known, first)
            if self._wear is None:
                self._wear = self._build_wear()
                if self._wear is None:
                    return  # no baseline friction to compare with (commission the robot first)
            else:
                base = self._wear_baseline()
                if base is not None:
                    self._wear.baseline = base
        T = np.where(
            np.isfinite(T) & np.isfinite(self._wear_t_ref),
            T,
            self._wear.baseline.viscous_temperature.reference_temperature,
        )
        events, self._wear_trends = self._wear.update(np.array([day]), F_c[None], b[None], T[None])
        for e in events:
            results.events.append(
                {
                    "kind": "wear",
                    "start_s": e.day * 86400.0,
                    "end_s": e.day * 86400.0,
                    "severity": "high" if e.rank_after == len(self.settings.wear_levels.names) else "medium",
                    "summary": (
                        f"actuator {e.actuator + 1}: friction {'rose to' if e.rising else 'fell back from'} "
                        f"'{e.level_after or e.level_before}' (indicator {e.indicator:.2f} of its baseline)"
                    ),
                    "figures": {
                        "actuator": e.actuator + 1,
                        "wear_indicator_ratio": e.indicator,
                        "level_before": e.level_before,
                        "level_after": e.level_after,
                    },  # fmt: skip
                    "evidence_start_s": None,
                    "evidence_end_s": None,
                    "evidence": None,
                    "source_seq": self._last_seq,
                }
            )

    # ---------------------------------------------------------------- model drift
    def _build_welch(self, dt_s: float) -> WelchAccumulator:
        s = self.settings
        welch = WelchSettings.for_window(
            segment_s=s.mode_segment_s, window_s=s.mode_window_s, dt_s=dt_s, band_hz=s.mode_band_hz
        )
        return WelchAccumulator(self.n, welch)

    def _mode_for(self, out: TrackerOutput, results: StepResults) -> None:
        """Add this output's innovation to the Welch sum; rows (and a drift event) for every estimate it completes."""
        if not self.settings.mode_tracking:
            return
        r = out.prior_residual
        if not np.all(np.isfinite(r)):
            return  # left out: the step to the next output is a gap, so no segment spans this one
        if self._welch is None:
            if out.t.shape[0] < 3:
                return
            self._welch = self._build_welch(float(np.median(np.diff(out.t))))  # the stream's own sample period
        for estimate in self._welch.update(out.t, r):
            self._mode_rows(estimate, results)

    def _mode_rows(self, e: WelchEstimate, results: StepResults) -> None:
        m = e.mode
        if m.quality is ModeQuality.NONE:
            return  # no peak above the floor: nothing to store (a frequency of NaN is no estimate)
        good = m.quality is ModeQuality.GOOD
        df = float(e.f[1] - e.f[0])
        f_std = m.frequency_std_hz if np.isfinite(m.frequency_std_hz) else df  # no fit std: one bin
        z_std = m.damping_std if np.isfinite(m.damping_std) else m.damping_ratio
        for name, value, std in (
            ("mode_frequency_hz", m.frequency_hz, f_std),
            ("mode_damping_ratio", m.damping_ratio, z_std),
        ):
            results.estimates.append(
                {"time_s": e.end_s, "parameter": name, "value": float(value), "std": float(std), "identifiable": good}
            )
        if not good:
            return
        s = self.settings
        if self._mode_reference.shape[0] < s.mode_reference_estimates:
            self._mode_reference = np.vstack([self._mode_reference, [[m.frequency_hz, m.damping_ratio]]])
            return
        f_ref, zeta_ref = (float(v) for v in np.median(self._mode_reference, axis=0))
        drop = (f_ref - m.frequency_hz) / f_ref  # relative fall of the natural frequency
        if self._mode_alarmed:
            self._mode_alarmed = drop >= 0.5 * s.mode_drift_fraction  # re-armed once back within half the limit
            return
        if drop <= s.mode_drift_fraction:
            return
        self._mode_alarmed = True
        results.events.append(
            {
                "kind": "drift",
                "start_s": e.start_s,
                "end_s": e.end_s,
                "severity": "medium",
                "summary": (
                    f"model drift: the structural mode fell from {f_ref:.2f} to {m.frequency_hz:.2f} Hz "
                    f"({100 * drop:.1f} %, more than {100 * s.mode_drift_fraction:.0f} %; damping ratio "
                    f"{zeta_ref:.3f} then, {m.damping_ratio:.3f} now): a stiffness has fallen, look for a loosening "
                    "joint or a cracked rod"
                ),
                "figures": {
                    "drift": "structural_mode",
                    "frequency_before_hz": f_ref,
                    "frequency_after_hz": m.frequency_hz,
                    "frequency_after_std_hz": float(f_std),
                    "frequency_drop_fraction": drop,
                    "drop_limit_fraction": s.mode_drift_fraction,
                    "damping_ratio_before": zeta_ref,
                    "damping_ratio_after": m.damping_ratio,
                    "reference_estimates_count": int(self._mode_reference.shape[0]),
                    "segments_count": e.segments,
                },
                "evidence_start_s": e.start_s,
                "evidence_end_s": e.end_s,
                "evidence": None,
                "source_seq": self._last_seq,
            }
        )

    def _residual_drift_for(self, out: TrackerOutput, rms: Array, results: StepResults, *, explained: bool) -> None:
        """Add this output's innovation to the RMS window (the wear window's grid); close it when past it.

        ``explained``: the output held a contact or a payload fault; its residual is that event's, and the window
        it falls in is not judged for drift (the events' own residual leaks into the outputs around them).
        """
        t0, t1 = float(out.t[0]), float(out.t[-1])
        if np.isnan(self._first_output_s):
            self._first_output_s = t0
        if t1 < self._first_output_s + self.settings.residual_drift_settle_s:
            return  # the filter is still converging from its prior: its innovation says little about the model
        index = float(np.floor(t1 / self.settings.wear_window_s))
        acc = self._rms_acc
        # an event judged in this output may lie in the window before it (a transfer judged once it ended, after a
        # pause): both windows are left unjudged
        self._rms_explained = self._rms_explained or explained
        if acc[0] >= 0 and index != acc[0] and acc[1] > 0:
            self._close_rms_window(acc, results)
            acc = np.concatenate([[-1.0, 0.0, np.nan, np.nan], np.zeros(self.n)])
            self._rms_explained = explained
        if explained:
            acc[0] = index
            self._rms_acc = acc
            return
        if acc[1] == 0:
            acc[2] = t0
        acc[0] = index
        acc[1] += out.n_samples
        acc[3] = t1
        acc[4:] += rms**2 * out.n_samples  # sum r^2 from the output's mean square
        self._rms_acc = acc

    def _close_rms_window(self, acc: Array, results: StepResults) -> None:
        s = self.settings
        min_s = min(5.0, 0.5 * s.wear_window_s) if s.residual_drift_min_s is None else s.residual_drift_min_s
        if self._rms_explained or acc[3] - acc[2] < min_s:
            return  # a window explained by an event, or too short to judge, says nothing about drift
        rms = np.sqrt(acc[4:] / acc[1])  # RMS of the innovation over the window [N m | N]
        noise = np.asarray(self.baseline.noise_std, dtype=float)
        with np.errstate(divide="ignore", invalid="ignore"):
            ratio = np.where(noise > 0.0, rms / noise, np.nan)
        for i in range(self.n):  # loop over actuators
            if self._rms_alarmed[i]:
                self._rms_alarmed[i] = not ratio[i] < s.residual_drift_clear_ratio
                continue
            if not ratio[i] > s.residual_drift_ratio:
                continue
            self._rms_alarmed[i] = True
            minutes = (acc[3] - acc[2]) / 60.0
            results.events.append(
                {
                    "kind": "drift",
                    "start_s": float(acc[2]),
                    "end_s": float(acc[3]),
                    "severity": "medium",
                    "summary": (
                        f"model drift: actuator {i + 1}'s effort residual RMS was {ratio[i]:.1f} times the baseline "
                        f"noise over {minutes:.1f} min ({rms[i]:.3g} against {noise[i]:.3g}; limit "
                        f"{s.residual_drift_ratio:.1f} times): the model no longer fits this drive, look for lost "
                        "calibration or grown backlash"
                    ),
                    "figures": {
                        "drift": "residual_rms",
                        "actuator": i + 1,
                        "residual_rms": float(rms[i]),
                        "baseline_noise_std": float(noise[i]),
                        "rms_to_noise_ratio": float(ratio[i]),
                        "limit_ratio": s.residual_drift_ratio,
                        "window_s": float(acc[3] - acc[2]),
                        "samples_count": int(acc[1]),
                    },
                    "evidence_start_s": float(acc[2]),
                    "evidence_end_s": float(acc[3]),
                    "evidence": None,
                    "source_seq": self._last_seq,
                }
            )

    def flush_events(self) -> StepResults:
        """At the end of a stream: the last, incomplete output period folded (its transfers judged), then the
        collisions still waiting for the end of their evidence window."""
        results = StepResults(self.robot_id)
        before = self.tracker.filter.state
        outputs = self.tracker.flush()
        for out in outputs:
            self._rows_for(out, results, before if len(outputs) == 1 else None)
        transfer, self._transfer = self._transfer, np.zeros((0, 3 + self.n))  # no transfer will be judged now
        self._release_events(np.inf, results)
        self._transfer = transfer
        return results

    def _release_events(self, t_now: float, results: StepResults) -> None:
        keep = []
        transfer_start = float(self._transfer[0, 0]) if self._transfer.shape[0] else np.inf
        for event in self._pending_events:
            # wait for the evidence window to pass, and for the transfer it falls in to be judged
            if event.evidence_end_time_s > t_now or event.end_time_s >= transfer_start:
                keep.append(event)
                continue
            results.events.append(self._event_row(event))
            self._recent_collisions.append(event)
        self._pending_events = keep

    def _event_row(self, e: CollisionEvent) -> dict[str, Any]:
        evidence = self._raw.window(e.evidence_start_time_s, e.evidence_end_time_s)
        blob = None
        if evidence is not None:
            t, q, eff, grip = evidence
            blob = encode_binary(
                SampleBatch(
                    robot_id=self.robot_id.rsplit("/", 1)[-1],
                    seq=self._last_seq,
                    position_unit=self.position_unit,
                    effort_kind=MeasuredQuantity.EFFORT,
                    t=t,
                    q=q,
                    effort=eff,
                    gripping=None if grip is None else grip.astype(bool),
                )
            )
        force_key = "platform_force_n" if self.delta else "platform_wrench_n_nm"
        rel = float(np.max(e.relative_peak))
        return {
            "kind": "collision",
            "start_s": e.start_time_s,
            "end_s": e.end_time_s,
            "severity": "high" if rel >= self.settings.health_limits.collision_act_rated_fraction else "medium",
            "summary": (
                f"external effort on the platform, peak {100 * rel:.0f} % of rated on actuator "
                f"{int(np.argmax(e.relative_peak)) + 1}, {1000 * e.duration_s:.0f} ms"
            ),
            "figures": {
                "peak_residual_per_actuator": e.peak_residual.tolist(),
                "relative_peak_per_actuator": e.relative_peak.tolist(),
                force_key: e.external_wrench.tolist(),
                "pose_actuator_positions": e.q_at_peak.tolist(),
                "peak_time_s": e.peak_time_s,
                "threshold_per_actuator": self.thresholds.tolist(),
            },
            "evidence_start_s": e.evidence_start_time_s,
            "evidence_end_s": e.evidence_end_time_s,
            "evidence": blob,
            "source_seq": self._last_seq,
        }

    def _health_for(self, out: TrackerOutput, rms: Array, t_end: float, results: StepResults) -> None:
        limits = self.settings.health_limits
        wear = self._wear.indicator[-1].copy() if self._wear is not None and self._wear.indicator.shape[0] else None
        wear = np.full(self.n, np.nan) if wear is None else wear
        actuators = actuator_health(rms, self.baseline.noise_std, wear, np.zeros(self.n), limits)
        day_now = t_end / 86400.0
        for trend in self._wear_trends:  # forecast of the last level, in days from now
            figures = actuators[trend.actuator].figures
            figures["wear_slope_per_day"] = trend.slope_per_day
            if np.isfinite(trend.crossing_day):
                figures["days_to_wear_limit"] = trend.crossing_day - day_now
                figures["days_to_wear_limit_earliest"] = trend.crossing_day_earliest - day_now
                figures["days_to_wear_limit_latest"] = trend.crossing_day_latest - day_now
        horizon = t_end - 3600.0
        self._recent_collisions = [c for c in self._recent_collisions if c.end_time_s >= horizon]
        deviation = float("nan")
        j = self.tracker.work_piece_index
        if j is not None and out.identifiable[j] and self.baseline.work_piece_mass_kg > 0:
            deviation = (float(out.x[j]) - self.baseline.work_piece_mass_kg) / self.baseline.work_piece_mass_kg
        robot = robot_health(actuators, self._recent_collisions, deviation, 0.0, limits)
        results.health.append(_health_row(t_end, "robot", robot))
        for i, h in enumerate(actuators):
            results.health.append(_health_row(t_end, f"actuator:{i + 1}", h))

    # ---------------------------------------------------------------- state
    def save_state(self) -> dict[str, np.ndarray]:
        """Everything the monitor carries, as arrays; :meth:`restore_state` resumes exactly."""
        state = {f"tracker/{k}": np.asarray(v) for k, v in self.tracker.save_state().items()}
        cs = self.collisions.save()
        obs = cs.observer
        state["collisions/has_observer"] = np.array(obs is not None)
        if obs is not None:
            state.update(
                {
                    "collisions/obs_t": np.array(obs.t_s),
                    "collisions/obs_p": obs.p,
                    "collisions/obs_u": obs.u,
                    "collisions/obs_r": obs.r,
                }  # fmt: skip
            )
        state["collisions/n_seen"] = np.array(cs.n_seen)
        state["collisions/dt_nominal"] = np.array(cs.dt_nominal_s)
        state["collisions/carry_index0"] = np.array(-1 if cs.carry_index0 is None else cs.carry_index0)
        state["collisions/carry_t"], state["collisions/carry_r"], state["collisions/carry_q"] = (
            cs.carry_t,
            cs.carry_r,
            cs.carry_q,
        )
        for name, events in (("pending", self._pending_events), ("recent", self._recent_collisions)):
            state.update(_events_to_arrays(f"{name}/", events))
        state.update(self._raw.save("raw/"))
        state["last_seq"] = np.array(self._last_seq)
        state["transfer"] = self._transfer.copy()
        state["transfer_pull"] = self._transfer_pull.copy()
        state["transfer_open"] = np.array(self._transfer_open)
        if self._work_index is not None:
            state["empty"] = self._empty.copy()
            state["expected_piece_kg"] = np.array(self._expected_piece_kg)
            state.update(self._piece_steps.save("piece_steps/"))
            state.update(self._tool_steps.save("tool_steps/"))
        state["wear/acc"] = self._wear_acc.copy()
        state["wear/t_ref"] = self._wear_t_ref.copy()
        state["wear/days"] = np.zeros(0) if self._wear is None else self._wear.days.copy()
        state["wear/indicator"] = np.zeros((0, self.n)) if self._wear is None else self._wear.indicator.copy()
        state["wear/ranks"] = np.zeros(self.n, dtype=np.int64) if self._wear is None else self._wear.ranks.copy()
        state["wear/built"] = np.array(self._wear is not None)
        state["x_prior"] = self._x_prior.copy()
        state["collisions/contact_holds"] = np.array(self._contact_holds)
        state["collisions/last_output_s"] = self._last_output_s.copy()
        state["collisions/has_last_sample"] = np.array(self._observer_last is not None)
        if self._observer_last is not None:
            state["collisions/last_q"] = self._observer_last.q.copy()
            state["collisions/last_qd"] = self._observer_last.qd.copy()
            state["collisions/last_gripping"] = np.array(self._observer_last.gripping)
        state["transfer_settled"] = np.array(self._settled)
        state["transfer_before/t_s"] = np.array(self._transfer_before_t_s)
        state["transfer_before/present"] = np.array(self._transfer_before is not None)
        if self._transfer_before is not None:
            state.update({f"transfer_before/{k}": v for k, v in self._transfer_before.to_dict().items()})
        state["std_prior"] = self._std_prior.copy()
        state["modes/dt_s"] = np.array(np.nan if self._welch is None else self._welch.settings.dt_s)
        if self._welch is not None:
            state.update(self._welch.save("modes/"))
        state["modes/reference"] = self._mode_reference.copy()
        state["modes/alarmed"] = np.array(self._mode_alarmed)
        state["residual_drift/acc"] = self._rms_acc.copy()
        state["residual_drift/alarmed"] = self._rms_alarmed.copy()
        state["residual_drift/first_output_s"] = np.array(self._first_output_s)
        state["residual_drift/explained"] = np.array(self._rms_explained)
        return state

    def restore_state(self, state: dict[str, np.ndarray]) -> None:
        self.tracker.restore_state({k[len("tracker/") :]: v for k, v in state.items() if k.startswith("tracker/")})
        obs = None
        if bool(state["collisions/has_observer"]):
            obs = ObserverState(
                float(state["collisions/obs_t"]),
                state["collisions/obs_p"],
                state["collisions/obs_u"],
                state["collisions/obs_r"],
            )
        idx = int(state["collisions/carry_index0"])
        self.collisions.restore(
            CollisionMonitorState(
                obs,
                int(state["collisions/n_seen"]),
                float(state["collisions/dt_nominal"]),
                None if idx < 0 else idx,
                state["collisions/carry_t"],
                state["collisions/carry_r"],
                state["collisions/carry_q"],
            )
        )
        self._pending_events = _events_from_arrays("pending/", state)
        self._recent_collisions = _events_from_arrays("recent/", state)
        self._raw = _RawBuffer.restore(self.n, "raw/", state)
        self._last_seq = int(state["last_seq"])
        self._transfer = np.asarray(state["transfer"], dtype=float).reshape(-1, 3 + self.n).copy()
        k, p_x = self._transfer.shape[0], self._pull_width
        pull = np.asarray(state.get("transfer_pull", np.zeros(0)), dtype=float)
        if p_x == 0 or pull.size != k * p_x:  # the delta keeps none; a checkpoint from before it was kept: unknown
            pull = np.full((k, p_x), np.nan)
        self._transfer_pull = pull.reshape(k, p_x).copy()
        self._transfer_open = bool(state["transfer_open"])
        if self._work_index is not None:  # checkpoints written before the step watches existed lack these keys
            self._empty = np.asarray(state.get("empty", np.zeros((0, 3 + self.n))), dtype=float).reshape(-1, 3 + self.n)
            described = float(self.description.tool.work_piece_mass_kg)  # type: ignore[union-attr]
            self._expected_piece_kg = float(state.get("expected_piece_kg", described))
            self._piece_steps.restore(state, "piece_steps/")
            self._tool_steps.restore(state, "tool_steps/")
        self._wear_acc = np.asarray(state["wear/acc"], dtype=float).copy()
        # checkpoints written before per-actuator reference temperatures hold one number (its NaN: not known)
        self._wear_t_ref = np.broadcast_to(np.asarray(state["wear/t_ref"], dtype=float), (self.n,)).copy()
        self._wear, self._wear_trends = None, []
        if bool(state["wear/built"]):
            self._wear = self._build_wear()
            if self._wear is not None:
                self._wear.days = np.asarray(state["wear/days"], dtype=float).copy()
                self._wear.indicator = np.asarray(state["wear/indicator"], dtype=float).reshape(-1, self.n).copy()
                self._wear.ranks = np.asarray(state["wear/ranks"], dtype=np.int64).copy()
                if self._wear.days.shape[0] >= 3:
                    tail = slice(-self._wear.trend_windows, None)
                    self._wear_trends = wear_trend(
                        self._wear.days[tail], self._wear.indicator[tail], limit=self._wear.limit
                    )
        self._x_prior = np.asarray(state["x_prior"], dtype=float).copy()
        self._contact_holds = int(state.get("collisions/contact_holds", 0))
        self._last_output_s = np.asarray(state.get("collisions/last_output_s", [np.nan, np.nan]), dtype=float).copy()
        self._observer_last = (
            None  # checkpoints written before the re-basing lack it: the first boundary is not re-based
        )
        if bool(state.get("collisions/has_last_sample", False)):
            self._observer_last = _CarriedSample(
                np.asarray(state["collisions/last_q"], dtype=float).copy(),
                np.asarray(state["collisions/last_qd"], dtype=float).copy(),
                bool(state["collisions/last_gripping"]),
            )
        self._settled = bool(state.get("transfer_settled", False))
        self._transfer_before_t_s = float(state.get("transfer_before/t_s", np.nan))
        self._transfer_before = None  # checkpoints written before it lack it: the open transfer is not undone
        if bool(state.get("transfer_before/present", False)):
            self._transfer_before = FilterState.from_dict({k: state[f"transfer_before/{k}"] for k in ("x", "P", "R")})
        self._std_prior = np.asarray(state["std_prior"], dtype=float).copy()
        # checkpoints written before the drift watches existed lack these keys: they start afresh
        dt_s = float(state.get("modes/dt_s", np.nan))
        self._welch = None
        if np.isfinite(dt_s) and self.settings.mode_tracking:
            self._welch = self._build_welch(dt_s)
            self._welch.restore(state, "modes/")
        reference = np.asarray(state.get("modes/reference", np.zeros((0, 2))), dtype=float)
        self._mode_reference = reference.reshape(-1, 2).copy()
        self._mode_alarmed = bool(state.get("modes/alarmed", False))
        fresh = np.concatenate([[-1.0, 0.0, np.nan, np.nan], np.zeros(self.n)])
        self._rms_acc = np.asarray(state.get("residual_drift/acc", fresh), dtype=float).copy()
        self._rms_alarmed = np.asarray(state.get("residual_drift/alarmed", np.zeros(self.n, dtype=bool)), dtype=bool)
        self._rms_alarmed = self._rms_alarmed.copy()
        self._first_output_s = float(state.get("residual_drift/first_output_s", np.nan))
        self._rms_explained = bool(state.get("residual_drift/explained", False))


def _same_layout_runs(batches: list[SampleBatch]) -> list[list[SampleBatch]]:
    """Split into runs of batches that carry the same optional signals (so they can be concatenated)."""

    def layout(b: SampleBatch) -> tuple[bool, ...]:
        return (b.effort is None, b.gripping is None, b.temperature_k is None)

    runs: list[list[SampleBatch]] = []
    for b in batches:
        if runs and layout(runs[-1][-1]) == layout(b):
            runs[-1].append(b)
        else:
            runs.append([b])
    return runs


@dataclass(frozen=True, slots=True)
class _CarriedSample:
    """The last sample the momentum observer saw: positions [rad | m], velocities, tool state."""

    q: Array
    qd: Array
    gripping: bool


def _observer_terms(monitor: RobotMonitor, q: Array, qd: Array, theta: Array) -> tuple[Array, Array]:
    """(M, beta = h - dM/dt qd) for the momentum observer, at each sample's payload theta (N, p).

    The delta's payload is one mass that comes and goes with the work piece, so each sample has its own
    (one pass of its kinematics, :meth:`DeltaModel.momentum_terms`); the hexapod's is one per block (one forward
    kinematics, :meth:`HexapodModel.momentum_terms`).
    """
    model = monitor.model
    if isinstance(model, DeltaModel):
        return model.momentum_terms(q, qd, theta[:, 0])
    if isinstance(model, HexapodModel):
        return model.momentum_terms(q, qd, theta[0])
    th = theta[0]
    Md = model.mass_matrix_rate(q, qd, th)
    return model.mass_matrix(q, th), model.bias_efforts(q, qd, th) - np.einsum("nij,nj->ni", Md, qd)


def _health_row(t: float, scope: str, h: Health) -> dict[str, Any]:
    return {
        "time_s": t,
        "scope": scope,
        "state": h.state.value,
        "reasons": list(h.reasons),
        "figures": {k: (None if not np.isfinite(v) else float(v)) for k, v in h.figures.items()},
    }


_EVENT_SCALARS = (
    "start_index", "end_index", "start_time_s", "end_time_s", "peak_index", "peak_time_s", "wrench_misfit",
    "evidence_start_time_s", "evidence_end_time_s", "evidence_start_index", "evidence_end_index",
)  # fmt: skip
_EVENT_VECTORS = ("peak_residual", "residual_at_peak", "q_at_peak", "external_wrench", "relative_peak")


def _events_to_arrays(prefix: str, events: list[CollisionEvent]) -> dict[str, np.ndarray]:
    out = {f"{prefix}count": np.array(len(events))}
    for k in _EVENT_SCALARS:
        out[f"{prefix}{k}"] = np.array([float(getattr(e, k)) for e in events])
    for k in _EVENT_VECTORS:
        out[f"{prefix}{k}"] = np.array([getattr(e, k) for e in events]) if events else np.zeros((0, 0))
    return out


def _events_from_arrays(prefix: str, state: dict[str, np.ndarray]) -> list[CollisionEvent]:
    events = []
    for i in range(int(state[f"{prefix}count"])):
        kwargs: dict[str, Any] = {}
        for k in _EVENT_SCALARS:
            v = float(state[f"{prefix}{k}"][i])
            kwargs[k] = int(v) if k.endswith("_index") else v
        for k in _EVENT_VECTORS:
            kwargs[k] = np.asarray(state[f"{prefix}{k}"][i], dtype=float)
        events.append(CollisionEvent(**kwargs))
    return events


class _RawBuffer:
    """The last seconds of raw samples, for evidence windows."""

    def __init__(self, n: int) -> None:
        self.t = np.zeros(0)
        self.q = np.zeros((0, n))
        self.effort = np.zeros((0, n))
        self.gripping = np.zeros(0)
        self.has_gripping = False

    def append(self, t: Array, q: Array, effort: Array, gripping: NDArray[np.bool_] | None) -> None:
        self.t = np.concatenate([self.t, t])
        self.q = np.concatenate([self.q, q])
        self.effort = np.concatenate([self.effort, effort])
        g = np.zeros(t.shape[0]) if gripping is None else gripping.astype(float)
        self.has_gripping = self.has_gripping or gripping is not None
        self.gripping = np.concatenate([self.gripping, g])

    def trim(self, before_s: float) -> None:
        k = int(np.searchsorted(self.t, before_s))
        self.t, self.q, self.effort, self.gripping = self.t[k:], self.q[k:], self.effort[k:], self.gripping[k:]

    def window(self, start_s: float, end_s: float) -> tuple[Array, Array, Array, Array | None] | None:
        a, b = int(np.searchsorted(self.t, start_s)), int(np.searchsorted(self.t, end_s, side="right"))
        if b <= a:
            return None
        return self.t[a:b], self.q[a:b], self.effort[a:b], self.gripping[a:b] if self.has_gripping else None

    def save(self, prefix: str) -> dict[str, np.ndarray]:
        return {
            f"{prefix}t": self.t,
            f"{prefix}q": self.q,
            f"{prefix}effort": self.effort,
            f"{prefix}gripping": self.gripping,
            f"{prefix}has_gripping": np.array(self.has_gripping),
        }

    @classmethod
    def restore(cls, n: int, prefix: str, state: dict[str, np.ndarray]) -> _RawBuffer:
        buf = cls(n)
        buf.t = state[f"{prefix}t"]
        buf.q = state[f"{prefix}q"].reshape(-1, n)
        buf.effort = state[f"{prefix}effort"].reshape(-1, n)
        buf.gripping = state[f"{prefix}gripping"]
        buf.has_gripping = bool(state[f"{prefix}has_gripping"])
        return buf

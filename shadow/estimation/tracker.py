"""Live payload and friction estimator of one robot: conditioning -> rigid-body regressor -> batched Kalman filter.

Measurement model (per conditioned sample k, actuator i, efforts at the joint side):

    tau_meas_k,i = tau_known,i(m_k,i) + H_i(m_k,i) x + v_k,i,    z_k = tau_meas_k - tau_known = H x + v_k

with m_k,i the motion (q, qd, qdd) at the instant the reported effort belongs to, ``t_k - d_i``: the mechanism
moves under the actual effort, so an actual effort belongs to the motion at its own instant up to the sampling of
a held command (about half a control period), and a streamed command leads the motion by half a period plus the
current loop's time constant (:func:`shadow.robots.drives.reported_effort_delay_s`; d from
``current_loop_bandwidth_hz``, ``reported_effort`` and ``command_period_s`` of the settings). The conditioner
evaluates each window's polynomial there (:class:`shadow.estimation.conditioning.EffortMotion`).

State x = [theta_p, theta_f]:
- delta (the model's payload is one mass): theta_p = [m_tool, m_work]; the model's mass column Y_p multiplies
  the tool mass always and the work-piece mass only while the tool grips: H_p = [Y_p, Y_p g_k] with g_k = 1 while
  gripping, 0 otherwise. Without a gripping signal g_k = 0: the work-piece mass then gets no information, and the
  filter flags it as not identifiable rather than guessing;
- hexapod (or any model with p > 1 payload parameters) with a declared work piece (a part clamped into the
  fixture while the tool state says so): theta_p = [pi_fixture (p), m_work]; the part's parameters are its mass
  times a declared w (p,) (its centre of mass and inertia per kg, ``work_piece_per_kg``), so that
  H_p = [Y_p, (Y_p w) g_k]: the payload while gripping is pi_fixture + m_work w (the parameters of two rigid
  bodies add). The delta's case is w = [1];
- hexapod without a declared work piece: theta_p = the model's p parameters, H_p = Y_p;
- theta_f: friction, k parameters per actuator (Coulomb, viscous, offset, optionally Stribeck), actuator-major.

The samples are grouped into output periods of ``output_period_s`` by their time stamps (block j holds the samples
with floor(t / output_period_s) = j), so the grouping does not depend on how the stream was split into batches;
a block is folded into the filter as soon as a later sample shows it is complete (or on :meth:`flush`).

Symbols
-------
t (N,) [s]; q, qd, qdd (N, n); tau (N, n) [N m | N]; Y_p (N, n, p); Y_f (N, n, k n); H (N, n, p + k n)
x, P, R, Q as in :mod:`shadow.estimation.kalman`
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from shadow.errors import ConfigurationError, expect_finite, expect_shape
from shadow.estimation.baseline import Baseline
from shadow.estimation.conditioning import (
    REASON_GAP,
    REASON_NOT_INCREASING,
    Conditioner,
    EffortMotion,
    Restart,
    regressor_at_efforts,
)
from shadow.estimation.kalman import BatchKalmanFilter, FilterModel, FilterState
from shadow.robots.drives import reported_effort_delay_s
from shadow.robots.friction import friction_regressor, parameter_names, parameters_per_actuator
from shadow.robots.mechanism import Mechanism
from shadow.robots.parameters import ReportedEffort

Array = NDArray[np.float64]

HEXAPOD_PAYLOAD_NAMES = ("m", "m_cx", "m_cy", "m_cz", "I_xx", "I_xy", "I_xz", "I_yy", "I_yz", "I_zz")
_REASONS = (REASON_GAP, REASON_NOT_INCREASING)
_PENDING = ("t", "q", "qd", "qdd", "effort", "gripping", "temperature", "segment_start")
_PENDING_MOTION = ("effort_q", "effort_qd", "effort_qdd")  # (K, G n): the motion at the efforts' instants


@dataclass(frozen=True, slots=True)
class TrackerSettings:
    """Knobs of the live estimator, SI units.

    half_window, poly_order, max_gap_s : Savitzky-Golay conditioning (delay = half_window samples)
    output_period_s : length of one filter batch / output [s]
    smooth_velocity : v_s of the friction model's smooth sign [rad/s | m/s]
    payload_prior_std : (p,) initial std of theta_p (delta p = 2: tool, work piece) [kg, kg m, kg m^2]
    payload_walk_std : (p,) random-walk std growth of theta_p [unit / sqrt(s)]
    friction_walk_std : (k,) random-walk std growth per friction class [unit / sqrt(s)]
    payload_resolution : (p,) a batch that pins theta_p,i to this std counts as exciting it [unit]
    friction_resolution : (k,) the same per friction class [unit]
    stribeck_velocity : v_st [rad/s | m/s], or None for no Stribeck term
    current_loop_bandwidth_hz : (n,) current-loop bandwidth per actuator [Hz], or None for ideal loops
    reported_effort : n :class:`ReportedEffort` values, what each streamed effort is; None: all actual
    command_period_s : (n,) hold period of each effort command [s] (the controller's cycle); None: continuous
        (the last three set the effort's instant, :attr:`effort_delay_s`)
    noise_time_constant_s : tau_R of the adaptive measurement noise [s], or None to keep R fixed
    n_temperatures : width of the optional temperature channel (0: none)
    work_piece_per_kg : w (p_model,) the gripped work piece's model parameters per kg of its mass, or None: the
        delta's [1]; no work piece on a model with p > 1 (see the module docstring)
    identifiability_memory_s : tau_I [s] of the identifiability flag's memory, or None: each output is judged on
        its own batch. With it, the information the batches added about parameter i,
        ``I_i <- exp(-T / tau_I) I_i + (1 / P+_ii - 1 / P-_ii)`` (T: time since the previous update), is
        accumulated, and the parameter counts as identifiable while ``I_i >= 1 / resolution_i^2``: the motion
        of about the last tau_I seconds pins it to its resolution, though no single output period does
    """

    half_window: int
    poly_order: int
    max_gap_s: float
    output_period_s: float
    smooth_velocity: float
    payload_prior_std: Array
    payload_walk_std: Array
    friction_walk_std: Array
    payload_resolution: Array
    friction_resolution: Array
    stribeck_velocity: float | None = None
    current_loop_bandwidth_hz: Array | None = None
    noise_time_constant_s: float | None = None
    n_temperatures: int = 0
    reported_effort: tuple[ReportedEffort, ...] | None = None
    command_period_s: Array | None = None
    identifiability_memory_s: float | None = None
    work_piece_per_kg: Array | None = None

    def effort_delay_s(self, n_actuators: int) -> Array:
        """d (n,) [s]: the reported effort at t_k belongs to the motion at t_k - d (see the module docstring)."""
        reported = self.reported_effort or (ReportedEffort.ACTUAL,) * n_actuators
        if len(reported) != n_actuators:
            raise ConfigurationError(f"reported_effort: expected {n_actuators} values, got {len(reported)}")
        return reported_effort_delay_s(reported, self.current_loop_bandwidth_hz, self.command_period_s)


@dataclass(frozen=True, slots=True)
class TrackerOutput:
    """One output period: the filter's estimate and how well the batch fitted."""

    t: Array  # (K,) sample times of the batch [s] (already delayed by the conditioner)
    parameter_names: tuple[str, ...]
    x: Array  # (p_x,) estimate after the batch
    std: Array  # (p_x,) its standard deviation
    identifiable: NDArray[np.bool_]  # (p_x,) the motion pins the parameter (see identifiability_memory_s)
    out_of_bounds: NDArray[np.bool_]  # (p_x,) estimate outside its physical range (never clamped)
    prior_residual: Array  # (K, n) z - H x before the batch (innovations) [N m | N]
    posterior_residual: Array  # (K, n) z - H x after the batch
    nis: float  # normalised innovation squared of the batch
    dof: int  # its degrees of freedom, K n
    noise_std: Array  # (n,) sqrt(diag R) the batch was weighed with
    gripping_fraction: float  # share of the batch's samples with the tool gripping
    temperature_mean: Array  # (n_temperatures,) mean of each temperature channel (NaN-aware)
    restarts: tuple[Restart, ...]  # conditioning restarts since the previous output
    q: Array  # (K, n) conditioned (delayed, time-aligned) actuator positions of the batch
    qd: Array  # (K, n) their Savitzky-Golay velocities
    effort: Array  # (K, n) measured efforts aligned with q, qd [N m | N]
    gripping: Array  # (K,) tool state aligned with q (1.0 gripping, 0.0 not)
    tau_known: Array  # (K, n) the model's effort without payload, at the efforts' instants [N m | N]
    Y_payload: Array  # (K, n, p_model) the model's payload regressor, at the efforts' instants

    @property
    def n_samples(self) -> int:
        return int(self.t.shape[0])


class PayloadFrictionTracker:
    """Follows payload and friction of one robot from its stream (t, q, effort[, tool state, temperatures])."""

    def __init__(self, mechanism: Mechanism, settings: TrackerSettings, baseline: Baseline) -> None:
        n = int(mechanism.n_actuators)
        p_model = int(mechanism.n_payload_parameters)
        self.mechanism = mechanism
        self.settings = settings
        self.n_actuators = n
        self.n_model_payload = p_model
        w = settings.work_piece_per_kg
        if w is None and p_model == 1:
            w = np.ones(1)
        if w is not None:
            w = np.asarray(w, dtype=float)
            if w.shape != (p_model,) or not np.all(np.isfinite(w)) or not w[0] > 0:
                raise ConfigurationError(
                    f"work_piece_per_kg: expected {p_model} finite numbers, the first (mass per kg) > 0; got {w}"
                )
        self.work_piece_per_kg = w  # (p_model,) or None
        k = parameters_per_actuator(stribeck=settings.stribeck_velocity is not None)
        self.friction_per_actuator = k
        if p_model == 1:
            payload_names = ["tool_mass", "work_piece_mass"]
            theta_p0 = np.array([baseline.tool_mass_kg, baseline.work_piece_mass_kg])
            lower_p = np.zeros(2)
        else:
            payload_names = [f"payload_{s}" for s in HEXAPOD_PAYLOAD_NAMES] if p_model == 10 else []
            payload_names = payload_names or [f"payload_{i + 1}" for i in range(p_model)]
            if baseline.payload_parameters is not None:
                theta_p0 = baseline.payload_parameters
            else:  # tool (+ work piece) as a point mass at the platform origin
                theta_p0 = np.zeros(p_model)
                theta_p0[0] = baseline.tool_mass_kg + (0.0 if w is not None else baseline.work_piece_mass_kg)
            lower_p = np.full(p_model, -np.inf)
            lower_p[0] = 0.0  # mass >= 0
            if w is not None:  # the fixture's parameters, then the part's mass
                payload_names = [*payload_names, "work_piece_mass"]
                theta_p0 = np.append(theta_p0, baseline.work_piece_mass_kg)
                lower_p = np.append(lower_p, 0.0)
        p = len(payload_names)
        self.n_payload = p
        if baseline.n_actuators != n:
            raise ConfigurationError(f"baseline noise_std: {baseline.n_actuators} actuators, the model has {n}")
        if theta_p0.shape != (p,):
            raise ConfigurationError(f"baseline payload_parameters: expected {p} numbers, got {theta_p0.shape}")
        if baseline.friction_parameters.shape != (k * n,):
            raise ConfigurationError(
                f"baseline friction_parameters: expected {k * n} numbers (k={k}), "
                f"got {baseline.friction_parameters.shape}"
            )
        vectors = {
            "payload_prior_std": (settings.payload_prior_std, p),
            "payload_walk_std": (settings.payload_walk_std, p),
            "payload_resolution": (settings.payload_resolution, p),
            "friction_walk_std": (settings.friction_walk_std, k),
            "friction_resolution": (settings.friction_resolution, k),
        }
        v = {}
        for name, (value, length) in vectors.items():
            a = np.asarray(value, dtype=float)
            if a.shape != (length,):
                raise ConfigurationError(f"{name}: expected {length} numbers, got shape {a.shape}")
            v[name] = a
        if np.any(~(v["payload_prior_std"] > 0)):
            raise ConfigurationError(f"payload_prior_std: must be > 0, got {v['payload_prior_std']}")
        if not settings.output_period_s > 0:
            raise ConfigurationError(f"output_period_s: must be > 0, got {settings.output_period_s}")
        memory = settings.identifiability_memory_s
        if memory is not None and not (np.isfinite(memory) and memory > 0):
            raise ConfigurationError(f"identifiability_memory_s: must be finite and > 0, or None; got {memory}")
        if settings.current_loop_bandwidth_hz is not None:
            f = np.asarray(settings.current_loop_bandwidth_hz, dtype=float)
            if f.shape != (n,) or np.any(~(f > 0)) or not np.all(np.isfinite(f)):
                raise ConfigurationError(f"current_loop_bandwidth_hz: expected {n} finite values > 0, got {f}")
        self.effort_delay_s = settings.effort_delay_s(n)  # (n,) [s]

        friction_lower = np.tile(np.array([0.0, 0.0] + [-np.inf] * (k - 2)), n)  # Coulomb, viscous >= 0
        self.parameter_names = tuple(
            payload_names + parameter_names(n, stribeck=settings.stribeck_velocity is not None)
        )
        model = FilterModel(
            q_rate=np.concatenate([v["payload_walk_std"] ** 2, np.tile(v["friction_walk_std"] ** 2, n)]),
            identifiability_std=np.concatenate([v["payload_resolution"], np.tile(v["friction_resolution"], n)]),
            r_time_constant_s=settings.noise_time_constant_s,
            lower=np.concatenate([lower_p, friction_lower]),
            upper=np.full(p + k * n, np.inf),
        )
        P0 = np.zeros((p + k * n, p + k * n))
        P0[:p, :p] = np.diag(v["payload_prior_std"] ** 2)
        P0[p:, p:] = baseline.friction_covariance
        state = FilterState(
            x=np.concatenate([theta_p0, baseline.friction_parameters]), P=P0, R=np.diag(baseline.noise_std**2)
        )
        self.filter = BatchKalmanFilter(model, state)
        self._information = np.zeros(p + k * n)  # I (p_x,) accumulated information [1/unit^2]
        self._channels = {"effort": n, "gripping": 1, "temperature": int(settings.n_temperatures)}
        self.conditioner = Conditioner(
            n,
            self._channels,
            half_window=settings.half_window,
            poly_order=settings.poly_order,
            max_gap_s=settings.max_gap_s,
            effort_delay_s=self.effort_delay_s,
        )
        self._motion_width = self.conditioner.effort_delays_s.shape[0] * n  # G n columns per pending motion array
        self._reset_runtime()

    def _reset_runtime(self) -> None:
        n = self.n_actuators
        widths = {"t": None, "q": n, "qd": n, "qdd": n, "effort": n, "gripping": 1}
        widths["temperature"] = self._channels["temperature"]
        widths.update({name: self._motion_width for name in _PENDING_MOTION})
        self._pending: dict[str, Array] = {
            name: np.zeros(0) if w is None else np.zeros((0, w)) for name, w in widths.items()
        }
        self._pending["segment_start"] = np.zeros(0, dtype=bool)
        self._pending_restarts: list[tuple[int, Restart]] = []  # (pending sample index it precedes, restart)
        self._last_update_t = np.nan  # time of the last sample of the previous batch [s]

    # ------------------------------------------------------------------ streaming
    @property
    def delay_samples(self) -> int:
        """Samples by which every output lags the newest input (the conditioner's half window)."""
        return self.conditioner.delay_samples

    def process(
        self,
        t: Array,
        q: Array,
        effort: Array,
        *,
        tool_gripping: NDArray[np.bool_] | None = None,
        temperatures: Array | None = None,
    ) -> list[TrackerOutput]:
        """Take a batch of the stream; return the outputs of the periods it completed (possibly none).

        Parameters
        ----------
        t : (N,) sample times [s];  q : (N, n) actuator positions;  effort : (N, n) measured efforts (finite)
        tool_gripping : (N,) bool, True while the tool holds a work piece; None: not gripping
        temperatures : (N, n_temperatures) drive temperatures [K], NaN allowed; None: all NaN

        On an error (bad shape, unreachable pose, ...) the tracker is left as it was before the call.
        """
        t = np.asarray(t, dtype=float)
        expect_shape("t", t, (None,))
        n_new = t.shape[0]
        effort = np.asarray(effort, dtype=float)
        expect_shape("effort", effort, (n_new, self.n_actuators))
        expect_finite("effort", effort)
        grip = np.zeros(n_new) if tool_gripping is None else np.asarray(tool_gripping, dtype=bool).astype(float)
        expect_shape("tool_gripping", grip, (n_new,))
        n_temp = self._channels["temperature"]
        temp = np.full((n_new, n_temp), np.nan) if temperatures is None else np.asarray(temperatures, dtype=float)
        expect_shape("temperatures", temp, (n_new, n_temp))
        snapshot = self.save_state()
        try:
            cb = self.conditioner.feed(t, q, {"effort": effort, "gripping": grip[:, None], "temperature": temp})
            new = {
                "t": cb.t,
                "q": cb.q,
                "qd": cb.qd,
                "qdd": cb.qdd,
                "effort": cb.channels["effort"],
                "gripping": cb.channels["gripping"],
                "temperature": cb.channels["temperature"],
                "segment_start": cb.segment_start,
            }
            em = cb.effort_motion
            for name, a in zip(_PENDING_MOTION, (em.q, em.qd, em.qdd), strict=True):
                new[name] = np.swapaxes(a, 0, 1).reshape(cb.n_samples, self._motion_width)  # (G, K, n) -> (K, G n)
            n_before = self._pending["t"].shape[0]
            self._pending = {k: np.concatenate([self._pending[k], new[k]]) for k in (*_PENDING, *_PENDING_MOTION)}
            self._pending_restarts += [
                (n_before + int(j), r) for j, r in zip(cb.restart_before, cb.restarts, strict=True)
            ]
            block = np.floor(self._pending["t"] / self.settings.output_period_s)  # block index of each sample
            edges = np.flatnonzero(np.diff(block) != 0) + 1  # first sample of each later block
            outputs = []
            start = 0
            for end in edges:  # loop over completed output periods, not samples
                outputs.append(self._fold(start, int(end)))
                start = int(end)
            self._drop_pending(start)
            return outputs
        except Exception:  # ShadowError, or a LinAlgError from a degenerate batch: leave no half-done update
            self.restore_state(snapshot)
            raise

    def flush(self) -> list[TrackerOutput]:
        """Fold the incomplete pending period now (e.g. at the end of a stream); [] if nothing is pending."""
        n_pending = self._pending["t"].shape[0]
        if n_pending == 0:
            return []
        out = self._fold(0, n_pending)
        self._drop_pending(n_pending)
        return [out]

    def _drop_pending(self, n_done: int) -> None:
        """Forget the first n_done pending samples (folded); restarts keep their place before the rest."""
        self._pending = {k: v[n_done:].copy() for k, v in self._pending.items()}
        self._pending_restarts = [(j - n_done, r) for j, r in self._pending_restarts]

    def _fold(self, a: int, b: int) -> TrackerOutput:
        """Regressor at the efforts' instants and Kalman update for pending samples a..b-1 (one output period)."""
        s = {k: v[a:b] for k, v in self._pending.items()}
        t = s["t"]
        tau_known, Y_p, qd_effort = regressor_at_efforts(self.mechanism, self._effort_motion(s))
        grip = s["gripping"][:, 0]
        if self.work_piece_per_kg is not None:
            y_work = (Y_p @ self.work_piece_per_kg) * grip[:, None]  # (K, n): Y_p w g_k
            Y_pay = np.concatenate([Y_p, y_work[:, :, None]], axis=2)  # [Y_p, Y_p w g_k]
        else:
            Y_pay = Y_p
        Y_f = friction_regressor(
            qd_effort, smooth_velocity=self.settings.smooth_velocity, stribeck_velocity=self.settings.stribeck_velocity
        )
        H = np.concatenate([Y_pay, Y_f], axis=2)  # (K, n, p + k n)
        z = s["effort"] - tau_known  # z = tau_meas - tau_known
        duration = t[-1] - self._last_update_t
        if not duration > 0:  # first batch, or time went back at a restart: propagate over the batch's own span
            duration = t[-1] - t[0]
        report = self.filter.step(H, z, float(duration))
        self._last_update_t = float(t[-1])
        identifiable = report.identifiable
        memory = self.settings.identifiability_memory_s
        if memory is not None:  # I <- exp(-T / tau_I) I + gain; flagged while I >= 1 / resolution^2
            gain = np.maximum(report.information_gain, 0.0)
            self._information = np.exp(-float(duration) / memory) * self._information + gain
            identifiable = self._information >= 1.0 / self.filter.model.identifiability_std**2
        temp = s["temperature"]
        if temp.shape[1] and np.any(np.isfinite(temp)):
            finite = np.isfinite(temp)
            counts = finite.sum(axis=0)
            sums = np.where(finite, temp, 0.0).sum(axis=0)
            temp_mean = np.where(counts > 0, sums / np.maximum(counts, 1), np.nan)
        else:
            temp_mean = np.full(temp.shape[1], np.nan)
        restarts = tuple(r for j, r in self._pending_restarts if j < b)  # restarts before the batch's last sample
        self._pending_restarts = [(j, r) for j, r in self._pending_restarts if j >= b]
        return TrackerOutput(
            t=t.copy(),
            parameter_names=self.parameter_names,
            x=report.x,
            std=report.std,
            identifiable=identifiable,
            out_of_bounds=report.out_of_bounds,
            prior_residual=report.prior_residual,
            posterior_residual=report.posterior_residual,
            nis=report.nis,
            dof=report.dof,
            noise_std=np.sqrt(np.diag(report.R_used)),
            gripping_fraction=float(grip.mean()),
            temperature_mean=temp_mean,
            restarts=restarts,
            q=s["q"].copy(),
            qd=s["qd"].copy(),
            effort=s["effort"].copy(),
            gripping=grip.copy(),
            tau_known=tau_known,
            Y_payload=Y_p,
        )

    @property
    def work_piece_index(self) -> int | None:
        """Index of ``work_piece_mass`` in the state, or None when the robot carries no declared work piece."""
        return None if self.work_piece_per_kg is None else self.n_model_payload

    def payload_per_sample(self, x: Array, gripping: Array) -> Array:
        """The model's payload parameters per sample (K, p_model) from a state x and the tool state (K,) (0 or 1):
        ``theta_p,k = pi + m_work w g_k`` (pi: the first p_model entries of x)."""
        p = self.n_model_payload
        g = np.asarray(gripping, dtype=float)
        theta = np.broadcast_to(np.asarray(x[:p], dtype=float), (g.shape[0], p))
        if self.work_piece_per_kg is None:
            return theta.copy()
        return theta + (float(x[p]) * g)[:, None] * self.work_piece_per_kg[None, :]

    def _effort_motion(self, s: Mapping[str, Array]) -> EffortMotion:
        """The pending motion at the efforts' instants, (K, G n) arrays back to :class:`EffortMotion`."""
        k = s["t"].shape[0]
        g = self.conditioner.effort_delays_s.shape[0]
        q, qd, qdd = (np.swapaxes(s[name].reshape(k, g, self.n_actuators), 0, 1) for name in _PENDING_MOTION)
        return EffortMotion(self.conditioner.effort_delays_s, self.conditioner.effort_group, q, qd, qdd)

    def reset_information(self, index: int, information: float = 0.0) -> None:
        """Start parameter ``index``'s accumulated information [1/unit^2] afresh (its value was reset, e.g. at a
        payload step: what the earlier motion said about it no longer holds; ``information`` is what the reset
        itself knows, 1 / std^2 of the new value)."""
        if not information >= 0.0:
            raise ConfigurationError(f"information: must be >= 0, got {information}")
        self._information[index] = information

    # ------------------------------------------------------------------ state
    def save_state(self) -> dict[str, Array]:
        """Everything the tracker carries, as plain arrays (copies). :meth:`restore_state` resumes bit-identically."""
        state = {f"conditioner/{k}": v for k, v in self.conditioner.save_state().items()}
        state.update({f"filter/{k}": v for k, v in self.filter.state.to_dict().items()})
        state.update({f"pending/{k}": v.copy() for k, v in self._pending.items()})
        pr = self._pending_restarts
        state["pending_restarts/before"] = np.array([j for j, _ in pr], dtype=np.int64)
        state["pending_restarts/t_s"] = np.array([r.t_s for _, r in pr], dtype=float)
        state["pending_restarts/gap_s"] = np.array([r.gap_s for _, r in pr], dtype=float)
        state["pending_restarts/reason"] = np.array([_REASONS.index(r.reason) for _, r in pr], dtype=np.int64)
        state["last_update_t"] = np.array(self._last_update_t)
        state["information"] = self._information.copy()
        return state

    def restore_state(self, state: Mapping[str, Array]) -> None:
        """Restore a state saved by :meth:`save_state` of a tracker built with the same model and settings."""
        missing = [k for k in ("filter/x", "filter/P", "filter/R", "last_update_t") if k not in state]
        if missing:
            raise ConfigurationError(f"tracker state: missing {missing}")
        filter_state = FilterState.from_dict({k: state[f"filter/{k}"] for k in ("x", "P", "R")})
        expect_shape("tracker state filter/x", filter_state.x, (self.filter.model.n_parameters,))
        expect_shape("tracker state filter/R", filter_state.R, (self.n_actuators, self.n_actuators))
        pending = {}
        for k in _PENDING:
            ref = self._pending[k]
            a = np.asarray(state[f"pending/{k}"], dtype=ref.dtype)
            expect_shape(f"tracker state pending/{k}", a, (None, *ref.shape[1:]))
            pending[k] = a.copy()
        n_pending = pending["t"].shape[0]
        g = self.conditioner.effort_delays_s.shape[0]
        for k, centre in zip(_PENDING_MOTION, ("q", "qd", "qdd"), strict=True):
            if f"pending/{k}" in state:
                a = np.asarray(state[f"pending/{k}"], dtype=float)
                expect_shape(f"tracker state pending/{k}", a, (n_pending, self._motion_width))
            else:  # a state saved before the efforts' instants were kept: the centre samples stand in for them
                a = np.tile(pending[centre], (1, g))
            pending[k] = a.copy()
        prefix = "conditioner/"
        self.conditioner.restore_state({k[len(prefix) :]: v for k, v in state.items() if k.startswith(prefix)})
        self.filter.state = filter_state
        self._pending = pending
        self._pending_restarts = [
            (int(j), Restart(t_s=float(ts), gap_s=float(gs), reason=_REASONS[int(rc)]))
            for j, ts, gs, rc in zip(
                state["pending_restarts/before"],
                state["pending_restarts/t_s"],
                state["pending_restarts/gap_s"],
                state["pending_restarts/reason"],
                strict=True,
            )
        ]
        self._last_update_t = float(state["last_update_t"])
        if "information" in state:  # states saved before the flag had a memory start from none
            info = np.asarray(state["information"], dtype=float)
            expect_shape("tracker state information", info, self._information.shape)
            self._information = info.copy()
        else:
            self._information = np.zeros_like(self._information)

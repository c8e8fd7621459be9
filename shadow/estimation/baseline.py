"""Healthy-state baseline of one robot: the starting point of the live payload and friction estimator.

Commissioning produces it; the live tracker starts from it and the detection stage compares against it.

Symbols
-------
n        : number of actuators;  k : friction parameters per actuator (3, or 4 with the Stribeck term)
theta_f  : (k n,) friction parameters, actuator-major as in :func:`shadow.robots.friction.friction_regressor`
P_f      : (k n, k n) covariance of theta_f [unit^2]
sigma_v  : (n,) measurement noise standard deviation per actuator [N m | N]
theta_p  : (p,) payload parameters for models whose payload is not a single mass (hexapod: the ten standard
           inertial parameters of tool + work piece about the platform origin); None for the delta
T_ref    : (n,) drive temperature at which theta_f holds [K] (the commissioning run's), or None (unknown)
k_v      : (n,) viscous temperature coefficient of ``F_v(T) = F_v(T_ref) exp(-k_v (T - T_ref))`` identified at
           commissioning [1/K]; NaN for an actuator whose run could not show it; None: not identified at all
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, replace
from typing import Any

import numpy as np
from numpy.typing import NDArray

from shadow.errors import ConfigurationError

Array = NDArray[np.float64]


def _vector(d: Mapping[str, Any], name: str, length: int | None = None) -> Array:
    if name not in d:
        raise ConfigurationError(f"{name}: missing")
    try:
        a = np.asarray(d[name], dtype=float)
    except (TypeError, ValueError) as exc:
        raise ConfigurationError(f"{name}: not a list of numbers ({exc})") from exc
    if a.ndim != 1 or (length is not None and a.shape[0] != length):
        want = "a vector" if length is None else f"{length} numbers"
        raise ConfigurationError(f"{name}: expected {want}, got shape {a.shape}")
    if not np.all(np.isfinite(a)):
        raise ConfigurationError(f"{name}: holds a non-finite value")
    return a


def _scalar(d: Mapping[str, Any], name: str) -> float:
    if name not in d:
        raise ConfigurationError(f"{name}: missing")
    try:
        v = float(d[name])
    except (TypeError, ValueError) as exc:
        raise ConfigurationError(f"{name}: not a number ({exc})") from exc
    if not np.isfinite(v):
        raise ConfigurationError(f"{name}: not finite")
    return v


def _optional_scalar(d: Mapping[str, Any], name: str) -> float | None:
    """A number, or None where the field is absent or null."""
    return None if d.get(name) is None else _scalar(d, name)


def _vector_or_nan(name: str, value: Any, length: int) -> Array:
    """A vector of ``length`` numbers in which None or NaN marks "not known" (stored as NaN); no infinities."""
    try:
        a = np.array([np.nan if v is None else v for v in np.asarray(value, dtype=object).reshape(-1)], dtype=float)
    except (TypeError, ValueError) as exc:
        raise ConfigurationError(f"{name}: not a list of numbers or nulls ({exc})") from exc
    if np.ndim(value) != 1 or a.shape[0] != length:
        raise ConfigurationError(f"{name}: expected {length} numbers, got shape {np.shape(value)}")
    if np.any(np.isinf(a)):
        raise ConfigurationError(f"{name}: holds an infinite value")
    return a


def _optional_vector_or_nan(d: Mapping[str, Any], name: str) -> Array | None:
    """The field as a vector (length checked by the Baseline), or None when it is missing or null."""
    value = d.get(name)
    if value is None:
        return None
    if not isinstance(value, list | tuple):
        raise ConfigurationError(f"{name}: not a list of numbers or nulls, got {type(value).__name__}")
    return _vector_or_nan(name, value, len(value))


def _list_or_none(a: Array | None) -> list[float | None] | None:
    """JSON has no NaN: "not known" entries become null."""
    return None if a is None else [float(v) if np.isfinite(v) else None for v in a]


@dataclass(frozen=True, slots=True)
class Baseline:
    """Friction parameters and their covariance, noise per actuator, tool and work-piece masses.

    friction_parameters : (k n,) theta_f
    friction_covariance : (k n, k n) P_f, symmetric positive definite
    noise_std : (n,) sigma_v per actuator [N m | N], > 0
    tool_mass_kg : mass of the tool carried by the platform [kg], >= 0
    work_piece_mass_kg : mass of the nominal work piece when gripped [kg], >= 0
    payload_parameters : (p,) theta_p of tool (+ work piece) for multi-parameter payload models, or None
    collision_threshold : (n,) momentum-observer thresholds calibrated on the healthy run [N m | N], or None
    reference_temperature_k : (n,) T_ref, drive temperatures at which the friction holds [K], or None (unknown;
        NaN entries: that actuator's temperature was not recorded)
    viscous_temperature_coefficient_per_k : (n,) k_v identified at commissioning [1/K], NaN where not identified,
        or None (not identified; files written before it existed lack the field)
    stribeck_velocity : v_st of the friction model's Stribeck term [rad/s | m/s], or None: no Stribeck term. It
        fixes the friction form the live tracker follows: k = 4 parameters per actuator with it, 3 without
    """

    friction_parameters: Array
    friction_covariance: Array
    noise_std: Array
    tool_mass_kg: float
    work_piece_mass_kg: float
    payload_parameters: Array | None = None
    collision_threshold: Array | None = None
    reference_temperature_k: Array | None = None
    viscous_temperature_coefficient_per_k: Array | None = None
    stribeck_velocity: float | None = None

    def __post_init__(self) -> None:
        f = _vector({"friction_parameters": self.friction_parameters}, "friction_parameters")
        cov = np.asarray(self.friction_covariance, dtype=float)
        if cov.shape != (f.shape[0], f.shape[0]):
            raise ConfigurationError(f"friction_covariance: expected shape {(f.shape[0],) * 2}, got {cov.shape}")
        if not np.all(np.isfinite(cov)) or not np.allclose(cov, cov.T, rtol=1e-12, atol=0.0):
            raise ConfigurationError("friction_covariance: must be finite and symmetric")
        try:
            np.linalg.cholesky(cov)
        except np.linalg.LinAlgError as exc:
            raise ConfigurationError("friction_covariance: not positive definite") from exc
        noise = _vector({"noise_std": self.noise_std}, "noise_std")
        if np.any(~(noise > 0)):
            raise ConfigurationError(f"noise_std: must be > 0, got {noise}")
        for name in ("tool_mass_kg", "work_piece_mass_kg"):
            v = _scalar({name: getattr(self, name)}, name)
            if v < 0:
                raise ConfigurationError(f"{name}: must be >= 0, got {v}")
            object.__setattr__(self, name, v)
        object.__setattr__(self, "friction_parameters", f)
        object.__setattr__(self, "friction_covariance", cov.copy())
        object.__setattr__(self, "noise_std", noise)
        if self.collision_threshold is not None:
            thr = _vector({"collision_threshold": self.collision_threshold}, "collision_threshold", noise.shape[0])
            if np.any(~(thr > 0)):
                raise ConfigurationError(f"collision_threshold: must be > 0, got {thr}")
            object.__setattr__(self, "collision_threshold", thr)
        n = noise.shape[0]
        if self.stribeck_velocity is not None:
            v_st = float(self.stribeck_velocity)
            if not (np.isfinite(v_st) and v_st > 0):
                raise ConfigurationError(f"stribeck_velocity: must be finite and > 0, got {self.stribeck_velocity}")
            object.__setattr__(self, "stribeck_velocity", v_st)
        k = 3 if self.stribeck_velocity is None else 4
        if f.shape[0] != k * n:
            form = "Coulomb, viscous, offset" + (", Stribeck" if k == 4 else "")
            raise ConfigurationError(
                f"friction_parameters: expected {k * n} numbers ({form} for each of {n} actuators), got {f.shape[0]}"
            )
        if self.reference_temperature_k is not None:
            t_ref = _vector_or_nan("reference_temperature_k", self.reference_temperature_k, n)
            if np.any(t_ref[np.isfinite(t_ref)] <= 0.0):
                raise ConfigurationError(f"reference_temperature_k: must be > 0 K (absolute), got {t_ref}")
            object.__setattr__(self, "reference_temperature_k", t_ref)
        if self.viscous_temperature_coefficient_per_k is not None:
            k_v = _vector_or_nan("viscous_temperature_coefficient_per_k", self.viscous_temperature_coefficient_per_k, n)
            object.__setattr__(self, "viscous_temperature_coefficient_per_k", k_v)
        if self.payload_parameters is not None:
            object.__setattr__(
                self,
                "payload_parameters",
                _vector({"payload_parameters": self.payload_parameters}, "payload_parameters"),
            )

    @property
    def n_actuators(self) -> int:
        return int(self.noise_std.shape[0])

    def without_stribeck(self) -> Baseline:
        """The same baseline in the Coulomb, viscous, offset form: the Stribeck level of each actuator and its
        rows and columns of the covariance left out (itself if it has no Stribeck term)."""
        if self.stribeck_velocity is None:
            return self
        keep = (np.arange(self.friction_parameters.shape[0]) % 4) < 3
        return replace(
            self,
            friction_parameters=self.friction_parameters[keep],
            friction_covariance=self.friction_covariance[np.ix_(keep, keep)],
            stribeck_velocity=None,
        )

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-ready values (lists of floats); :meth:`from_dict` rebuilds an equal baseline."""
        return {
            "friction_parameters": self.friction_parameters.tolist(),
            "friction_covariance": self.friction_covariance.tolist(),
            "noise_std": self.noise_std.tolist(),
            "tool_mass_kg": self.tool_mass_kg,
            "work_piece_mass_kg": self.work_piece_mass_kg,
            "payload_parameters": None if self.payload_parameters is None else self.payload_parameters.tolist(),
            "collision_threshold": None if self.collision_threshold is None else self.collision_threshold.tolist(),
            "reference_temperature_k": _list_or_none(self.reference_temperature_k),
            "viscous_temperature_coefficient_per_k": _list_or_none(self.viscous_temperature_coefficient_per_k),
            "stribeck_velocity": self.stribeck_velocity,
        }

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> Baseline:
        """Build from :meth:`to_dict` output; raises ConfigurationError naming a missing or bad field."""
        if "friction_covariance" not in d:
            raise ConfigurationError("friction_covariance: missing")
        try:
            cov = np.asarray(d["friction_covariance"], dtype=float)
        except (TypeError, ValueError) as exc:
            raise ConfigurationError(f"friction_covariance: not a matrix of numbers ({exc})") from exc
        payload = d.get("payload_parameters")
        return cls(
            friction_parameters=_vector(d, "friction_parameters"),
            friction_covariance=cov,
            noise_std=_vector(d, "noise_std"),
            tool_mass_kg=_scalar(d, "tool_mass_kg"),
            work_piece_mass_kg=_scalar(d, "work_piece_mass_kg"),
            payload_parameters=None if payload is None else _vector(d, "payload_parameters"),
            collision_threshold=None if d.get("collision_threshold") is None else _vector(d, "collision_threshold"),
            reference_temperature_k=_optional_vector_or_nan(d, "reference_temperature_k"),
            viscous_temperature_coefficient_per_k=_optional_vector_or_nan(d, "viscous_temperature_coefficient_per_k"),
            stribeck_velocity=_optional_scalar(d, "stribeck_velocity"),  # files written before it: None
        )

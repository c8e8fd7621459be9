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
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
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
    """

    friction_parameters: Array
    friction_covariance: Array
    noise_std: Array
    tool_mass_kg: float
    work_piece_mass_kg: float
    payload_parameters: Array | None = None
    collision_threshold: Array | None = None

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
        if self.payload_parameters is not None:
            object.__setattr__(
                self,
                "payload_parameters",
                _vector({"payload_parameters": self.payload_parameters}, "payload_parameters"),
            )

    @property
    def n_actuators(self) -> int:
        return int(self.noise_std.shape[0])

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
        )

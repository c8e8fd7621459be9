"""Per-actuator joint friction, linear in its parameters.

Symbols
-------
qd      : (N, n) actuator velocities [rad/s | m/s]
tau_f   : (N, n) friction effort [N m | N], opposing motion for positive parameters
theta_f : (k n,) friction parameters, actuator-major: ``[F_c1, F_v1, o_1, (F_s1), F_c2, ...]``
Y_f     : (N, n, k n) regressor, ``tau_f = Y_f @ theta_f``, block-diagonal: actuator i's row has non-zero
          columns ``i k .. i k + k - 1`` only
v_s     : smoothing velocity of the sign function [rad/s | m/s]
v_st    : Stribeck velocity [rad/s | m/s]

Model (per actuator): ``tau_f = F_c s(qd) + F_v qd + o [+ F_s s(qd) exp(-(qd / v_st)^2)]`` with
``s(qd) = tanh(qd / v_s)``: Coulomb friction ``F_c``, viscous ``F_v``, a constant offset ``o`` (it
absorbs a torque-sensor or current-offset bias and a small gravity-model error), and optionally a
Stribeck term ``F_s``. Coulomb-plus-viscous friction with a Stribeck rise at low speed is the classic
model of Armstrong-Helouvry, Dupont & Canudas de Wit, "A survey of models, analysis tools and compensation
methods for the control of machines with friction", Automatica 30(7), 1994.

Why a smooth sign: ``sign(qd)`` jumps at ``qd = 0``, so near rest the regressor column flips between -1
and +1 on velocity noise and the estimate chatters; ``tanh(qd / v_s)`` passes through zero and equals
the sign to within 2 percent once ``|qd| > 2.3 v_s``.

The Stribeck term is linear in ``F_s`` only because ``v_st`` is fixed (a named keyword); estimating
``v_st`` too would make the model non-linear in its parameters.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike, NDArray

from shadow.errors import OutOfRangeError, ShapeError, expect_finite, expect_shape

Array = NDArray[np.float64]

PARAMETER_NAMES = ("coulomb", "viscous", "offset")
STRIBECK_NAME = "stribeck"


def parameters_per_actuator(*, stribeck: bool = False) -> int:
    """k: 3 (Coulomb, viscous, offset), or 4 with the Stribeck term."""
    return len(PARAMETER_NAMES) + int(stribeck)


def parameter_names(n_actuators: int, *, stribeck: bool = False) -> list[str]:
    """Names of theta_f's entries in order, e.g. ``coulomb_1, viscous_1, offset_1, coulomb_2, ...`` (1-based)."""
    names = (*PARAMETER_NAMES, STRIBECK_NAME) if stribeck else PARAMETER_NAMES
    return [f"{name}_{i + 1}" for i in range(n_actuators) for name in names]


def friction_regressor(
    qd: ArrayLike,
    *,
    smooth_velocity: float | ArrayLike,
    stribeck_velocity: float | ArrayLike | None = None,
) -> Array:
    """Regressor Y_f with ``tau_f = Y_f @ theta_f``.

    Parameters
    ----------
    qd : (N, n) actuator velocities [rad/s | m/s]
    smooth_velocity : v_s, scalar or (n,) [rad/s | m/s], > 0
    stribeck_velocity : v_st, scalar or (n,) [rad/s | m/s], > 0; None leaves the Stribeck column out

    Returns
    -------
    Y_f : (N, n, k n), k = 3 or 4; per actuator the columns are
        ``[tanh(qd / v_s), qd, 1, (tanh(qd / v_s) exp(-(qd / v_st)^2))]``.
    """
    v = np.asarray(qd, dtype=float)
    if v.ndim != 2:
        raise ShapeError(f"qd: expected shape (N, n), got {v.shape}")
    expect_finite("qd", v)
    n_samples, n = v.shape
    v_s = _positive_per_actuator("smooth_velocity", smooth_velocity, n)
    s = np.tanh(v / v_s)  # smooth sign s(qd) = tanh(qd / v_s)
    columns = [s, v, np.ones_like(v)]  # F_c s(qd), F_v qd, offset
    if stribeck_velocity is not None:
        v_st = _positive_per_actuator("stribeck_velocity", stribeck_velocity, n)
        columns.append(s * np.exp(-((v / v_st) ** 2)))  # F_s s(qd) exp(-(qd / v_st)^2)
    k = len(columns)
    blocks = np.stack(columns, axis=-1)  # (N, n, k)
    y_f = np.zeros((n_samples, n, n, k))
    idx = np.arange(n)
    y_f[:, idx, idx, :] = blocks  # block-diagonal: actuator i only sees its own k parameters
    return y_f.reshape(n_samples, n, n * k)


def friction_effort(
    qd: ArrayLike,
    theta_f: ArrayLike,
    *,
    smooth_velocity: float | ArrayLike,
    stribeck_velocity: float | ArrayLike | None = None,
) -> Array:
    """Friction effort ``tau_f = Y_f @ theta_f``, (N, n) [N m | N].

    Parameters
    ----------
    qd : (N, n) [rad/s | m/s]
    theta_f : (k n,) parameters in the layout of :func:`friction_regressor`
    smooth_velocity, stribeck_velocity : as in :func:`friction_regressor`
    """
    y_f = friction_regressor(qd, smooth_velocity=smooth_velocity, stribeck_velocity=stribeck_velocity)
    theta = np.asarray(theta_f, dtype=float)
    expect_shape("theta_f", theta, (y_f.shape[2],))
    return np.einsum("Nij,j->Ni", y_f, theta)  # tau_f = Y_f theta_f


def _positive_per_actuator(name: str, value: float | ArrayLike, n: int) -> Array:
    a = np.broadcast_to(np.asarray(value, dtype=float), (n,)) if np.ndim(value) == 0 else np.asarray(value, float)
    expect_shape(name, a, (n,))
    if not np.all(a > 0.0) or not np.all(np.isfinite(a)):
        raise OutOfRangeError(f"{name}: must be finite and > 0, got {a}")
    return a

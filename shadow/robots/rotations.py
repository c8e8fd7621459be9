"""Small rotation helpers, vectorised over a leading sample axis N.

Symbols
-------
R       : (N, 3, 3) rotation matrix, maps platform-frame vectors to base-frame vectors
angles  : (N, 3) fixed-axis XYZ angles (roll, pitch, yaw) [rad]: ``R = Rz(yaw) Ry(pitch) Rx(roll)``,
          i.e. roll about the fixed x axis first, then pitch about the fixed y axis, then yaw about z
rates   : (N, 3) time derivatives of the angles [rad/s]; ``accels`` their second derivatives [rad/s^2]
phi     : (N, 3) rotation vector [rad] (axis times angle), ``R = exp([phi]x)``
omega   : (N, 3) angular velocity in the base frame [rad/s], ``dR/dt = [omega]x R``

Sources: Rodrigues' formula and its inverse, Murray, Li and Sastry, *A Mathematical Introduction to
Robotic Manipulation* (1994), section 2.2; fixed-angle conventions, Craig, *Introduction to Robotics*
(3rd ed.), section 2.8. Equation numbers below are from memory.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import NDArray

from shadow.errors import expect_finite, expect_shape

Array = NDArray[np.float64]

_SMALL_ANGLE_RAD = 1e-6  # below this the series forms of sin(x)/x etc. are used
_NEXT = np.array([1, 2, 0])  # k + 1 mod 3
_AFTER = np.array([2, 0, 1])  # k + 2 mod 3


def cross(a: Array, b: Array) -> Array:
    """``a x b`` over the last axis (length 3), broadcasting; a lighter ``np.cross`` for small batches."""
    # component k: a_{k+1} b_{k+2} - a_{k+2} b_{k+1} (indices mod 3), four gathers instead of six slices and a stack
    return a[..., _NEXT] * b[..., _AFTER] - a[..., _AFTER] * b[..., _NEXT]


def skew(v: Array) -> Array:
    """Cross-product matrix ``[v]x`` with ``[v]x w = v x w``. v (N, 3) -> (N, 3, 3)."""
    v = np.asarray(v, dtype=float)
    expect_shape("v", v, (None, 3))
    out = np.zeros((v.shape[0], 3, 3))
    out[:, 0, 1], out[:, 0, 2] = -v[:, 2], v[:, 1]
    out[:, 1, 0], out[:, 1, 2] = v[:, 2], -v[:, 0]
    out[:, 2, 0], out[:, 2, 1] = -v[:, 1], v[:, 0]
    return out


def _axis_rotations(angles: Array) -> tuple[Array, Array, Array]:
    """Elementary rotations Rx(roll), Ry(pitch), Rz(yaw), each (N, 3, 3)."""
    c, s = np.cos(angles), np.sin(angles)
    n = angles.shape[0]
    rx, ry, rz = (np.zeros((n, 3, 3)) for _ in range(3))
    rx[:, 0, 0] = 1.0
    rx[:, 1, 1], rx[:, 1, 2], rx[:, 2, 1], rx[:, 2, 2] = c[:, 0], -s[:, 0], s[:, 0], c[:, 0]
    ry[:, 1, 1] = 1.0
    ry[:, 0, 0], ry[:, 0, 2], ry[:, 2, 0], ry[:, 2, 2] = c[:, 1], s[:, 1], -s[:, 1], c[:, 1]
    rz[:, 2, 2] = 1.0
    rz[:, 0, 0], rz[:, 0, 1], rz[:, 1, 0], rz[:, 1, 1] = c[:, 2], -s[:, 2], s[:, 2], c[:, 2]
    return rx, ry, rz


def rotation_from_xyz_angles(angles: Array) -> Array:
    """``R = Rz(yaw) Ry(pitch) Rx(roll)`` (Craig eq. 2.64). angles (N, 3) [rad] -> (N, 3, 3)."""
    angles = np.asarray(angles, dtype=float)
    expect_shape("angles", angles, (None, 3))
    rx, ry, rz = _axis_rotations(angles)
    return rz @ ry @ rx


def xyz_angles_from_rotation(R: Array) -> Array:
    """Inverse of :func:`rotation_from_xyz_angles` with pitch in [-pi/2, pi/2] (Craig eq. 2.66).

    At pitch = +-pi/2 (gimbal lock) roll is set to 0 and yaw carries the whole turn.
    R (N, 3, 3) -> (N, 3) [rad].
    """
    R = np.asarray(R, dtype=float)
    expect_shape("R", R, (None, 3, 3))
    pitch = np.arctan2(-R[:, 2, 0], np.hypot(R[:, 0, 0], R[:, 1, 0]))  # -sin(pitch) = r31
    locked = np.hypot(R[:, 0, 0], R[:, 1, 0]) < 1e-12
    roll = np.where(locked, 0.0, np.arctan2(R[:, 2, 1], R[:, 2, 2]))  # tan(roll) = r32 / r33
    yaw = np.where(locked, np.arctan2(-R[:, 0, 1], R[:, 1, 1]), np.arctan2(R[:, 1, 0], R[:, 0, 0]))
    return np.stack([roll, pitch, yaw], axis=1)


def exp_rotation(phi: Array) -> Array:
    """Rodrigues: ``R = 1 + sin(t)/t [phi]x + (1 - cos t)/t^2 [phi]x^2``, t = |phi| (MLS eq. 2.14).

    phi (N, 3) [rad] -> (N, 3, 3).
    """
    phi = np.asarray(phi, dtype=float)
    expect_shape("phi", phi, (None, 3))
    t = np.linalg.norm(phi, axis=1)
    small = t < _SMALL_ANGLE_RAD
    ts = np.where(small, 1.0, t)
    a = np.where(small, 1.0 - t**2 / 6.0, np.sin(ts) / ts)  # sin(t)/t
    b = np.where(small, 0.5 - t**2 / 24.0, (1.0 - np.cos(ts)) / ts**2)  # (1 - cos t)/t^2
    k = skew(phi)
    return np.eye(3) + a[:, None, None] * k + b[:, None, None] * (k @ k)


def log_rotation(R: Array) -> Array:
    """Rotation vector phi with ``exp([phi]x) = R``, |phi| in [0, pi] (MLS eq. 2.17). (N, 3, 3) -> (N, 3)."""
    R = np.asarray(R, dtype=float)
    expect_shape("R", R, (None, 3, 3))
    expect_finite("R", R)
    cos_t = np.clip((np.trace(R, axis1=1, axis2=2) - 1.0) / 2.0, -1.0, 1.0)  # tr R = 1 + 2 cos t
    w = np.stack([R[:, 2, 1] - R[:, 1, 2], R[:, 0, 2] - R[:, 2, 0], R[:, 1, 0] - R[:, 0, 1]], axis=1)  # 2 sin t a
    sin_t = np.linalg.norm(w, axis=1) / 2.0
    t = np.arctan2(sin_t, cos_t)  # well conditioned for every t, unlike arccos near 0
    small = t < _SMALL_ANGLE_RAD
    near_pi = (sin_t < 1e-4) & (cos_t < 0.0)
    factor = np.where(small, 0.5 + t**2 / 12.0, t / (2.0 * np.where(small | near_pi, 1.0, sin_t)))
    phi = factor[:, None] * w
    if near_pi.any():
        # R + R^T = 2 cos t 1 + 2 (1 - cos t) a a^T: take the axis from the largest diagonal entry
        idx = np.flatnonzero(near_pi)
        s = (R[idx] + np.swapaxes(R[idx], 1, 2)) / 2.0 - cos_t[idx, None, None] * np.eye(3)
        s /= (1.0 - cos_t[idx])[:, None, None]  # s = a a^T
        col = np.argmax(np.diagonal(s, axis1=1, axis2=2), axis=1)
        axis = s[np.arange(idx.size), :, col]
        axis /= np.linalg.norm(axis, axis=1, keepdims=True)
        sign = np.where(np.einsum("ij,ij->i", axis, w[idx]) < 0.0, -1.0, 1.0)  # sin t a has w's direction
        phi[idx] = sign[:, None] * axis * t[idx, None]
    return phi


def angular_velocity_from_xyz_rates(angles: Array, rates: Array) -> Array:
    """omega = yaw' z + pitch' Rz y + roll' Rz Ry x (base frame). (N, 3), (N, 3) -> (N, 3) [rad/s]."""
    angles = np.asarray(angles, dtype=float)
    rates = np.asarray(rates, dtype=float)
    expect_shape("angles", angles, (None, 3))
    expect_shape("rates", rates, (angles.shape[0], 3))
    _, ry, rz = _axis_rotations(angles)
    y_axis = rz[:, :, 1]  # Rz e_y
    x_axis = (rz @ ry)[:, :, 0]  # Rz Ry e_x
    z_axis = np.broadcast_to(np.array([0.0, 0.0, 1.0]), angles.shape)
    return rates[:, 2:3] * z_axis + rates[:, 1:2] * y_axis + rates[:, 0:1] * x_axis


def angular_acceleration_from_xyz_rates(angles: Array, rates: Array, accels: Array) -> Array:
    """d(omega)/dt for the angles' motion, base frame. (N, 3) x 3 -> (N, 3) [rad/s^2].

    Differentiating :func:`angular_velocity_from_xyz_rates`: ``d(Rz e_y)/dt = w_z x Rz e_y`` with
    ``w_z = yaw' z``, and ``d(Rz Ry e_x)/dt = w_zy x Rz Ry e_x`` with ``w_zy = yaw' z + pitch' Rz e_y``.
    """
    angles = np.asarray(angles, dtype=float)
    rates = np.asarray(rates, dtype=float)
    accels = np.asarray(accels, dtype=float)
    expect_shape("angles", angles, (None, 3))
    expect_shape("rates", rates, (angles.shape[0], 3))
    expect_shape("accels", accels, (angles.shape[0], 3))
    _, ry, rz = _axis_rotations(angles)
    y_axis = rz[:, :, 1]
    x_axis = (rz @ ry)[:, :, 0]
    z_axis = np.broadcast_to(np.array([0.0, 0.0, 1.0]), angles.shape)
    w_z = rates[:, 2:3] * z_axis
    w_zy = w_z + rates[:, 1:2] * y_axis
    return (
        accels[:, 2:3] * z_axis
        + accels[:, 1:2] * y_axis
        + rates[:, 1:2] * cross(w_z, y_axis)
        + accels[:, 0:1] * x_axis
        + rates[:, 0:1] * cross(w_zy, x_axis)
    )

"""Fixed-step integrators for the simulated plants, vectorised over a leading batch axis.

Every step function takes the state ``x`` of shape (B, m) (B independent systems side by side) and the
derivative ``f(t, x) -> (B, m)``; nothing loops over the batch.

Symbols
-------
t : float, time [s]
h : float, step [s]
x : (B, m) state; for the second-order forms ``q`` (B, n) positions and ``v`` (B, n) velocities
f : callable ``f(t, x) -> xdot`` (B, m); ``a(t, q, v) -> vdot`` (B, n) for the second-order forms

Methods and their global order of accuracy (Hairer, Norsett, Wanner, *Solving Ordinary Differential
Equations I*, 2nd ed., 1993, Sec. II.1, Table 1.2 (classical Runge-Kutta, order 4) and eq. (1.5) (Heun, order 2);
semi-implicit (symplectic) Euler: Hairer, Lubich, Wanner, *Geometric Numerical Integration*, 2nd ed., 2006,
Sec. I.1.2, order 1):

========================  =====  ============================  ===============================
method                    order  derivative calls per step     note
========================  =====  ============================  ===============================
``Method.RK4``            4      4                             classical Runge-Kutta
``Method.HEUN``           2      2                             explicit trapezoidal rule (RK2)
``Method.SYMPLECTIC``     1      1                             v first, then q with the new v
========================  =====  ============================  ===============================

Exact discretisations of the fast linear parts (used at the internal rate instead of a Runge-Kutta step):

``lag_factor(time_constant_s, h)``
    ``alpha = exp(-h / T)``: a first-order lag ``T y' + y = u`` with ``u`` held over the step gives
    ``y_{k+1} = u + (y_k - u) alpha`` (zero-order-hold discretisation; Franklin, Powell, Workman,
    *Digital Control of Dynamic Systems*, 3rd ed., 1998, eq. (4.59)).
"""

from __future__ import annotations

import enum
from collections.abc import Callable

import numpy as np
from numpy.typing import NDArray

from shadow.errors import ShapeError

Array = NDArray[np.float64]
Derivative = Callable[[float, Array], Array]
Acceleration = Callable[[float, Array, Array], Array]


class Method(enum.Enum):
    """Fixed-step integration method; the value is the method's global order."""

    RK4 = 4
    HEUN = 2
    SYMPLECTIC = 1

    @property
    def order(self) -> int:
        """Global order of accuracy p: the error falls like h**p."""
        return int(self.value)


def rk4_step(f: Derivative, t: float, x: Array, h: float) -> Array:
    """One classical Runge-Kutta step (Hairer-Norsett-Wanner 1993, Table II.1.2). x: (B, m) -> (B, m)."""
    k1 = f(t, x)  # k1 = f(t, x)
    k2 = f(t + 0.5 * h, x + 0.5 * h * k1)  # k2 = f(t + h/2, x + h/2 k1)
    k3 = f(t + 0.5 * h, x + 0.5 * h * k2)  # k3 = f(t + h/2, x + h/2 k2)
    k4 = f(t + h, x + h * k3)  # k4 = f(t + h, x + h k3)
    return x + (h / 6.0) * (k1 + 2.0 * k2 + 2.0 * k3 + k4)  # x + h/6 (k1 + 2 k2 + 2 k3 + k4)


def heun_step(f: Derivative, t: float, x: Array, h: float) -> Array:
    """One Heun (explicit trapezoidal, RK2) step (Hairer-Norsett-Wanner 1993, eq. II.1.5). x: (B, m)."""
    k1 = f(t, x)
    k2 = f(t + h, x + h * k1)  # predictor with an Euler step
    return x + 0.5 * h * (k1 + k2)  # trapezoidal corrector


def symplectic_euler_step(a: Acceleration, t: float, q: Array, v: Array, h: float) -> tuple[Array, Array]:
    """One semi-implicit Euler step for q' = v, v' = a(t, q, v) (Hairer-Lubich-Wanner 2006, Sec. I.1.2).

    ``v_{k+1} = v_k + h a(t_k, q_k, v_k)``, then ``q_{k+1} = q_k + h v_{k+1}``. q, v: (B, n).
    """
    v_next = v + h * a(t, q, v)
    return q + h * v_next, v_next


def second_order_derivative(a: Acceleration, n: int) -> Derivative:
    """Wrap ``a(t, q, v)`` as a first-order derivative of ``x = [q, v]`` (B, 2n) for the Runge-Kutta steps."""

    def f(t: float, x: Array) -> Array:
        q, v = x[:, :n], x[:, n:]
        return np.concatenate([v, a(t, q, v)], axis=1)

    return f


def integrate(
    a: Acceleration,
    q0: Array,
    v0: Array,
    *,
    t0_s: float,
    step_s: float,
    n_steps: int,
    method: Method = Method.RK4,
) -> tuple[Array, Array]:
    """Integrate q'' = a(t, q, q') over ``n_steps`` fixed steps; returns (q, v) of shape (n_steps + 1, B, n).

    Parameters
    ----------
    a : callable ``a(t, q, v) -> (B, n)``
    q0, v0 : (B, n) initial positions and velocities
    t0_s, step_s : start time and fixed step [s]
    n_steps : number of steps
    method : :class:`Method`

    Raises
    ------
    ShapeError
        if q0 and v0 differ in shape or are not two-dimensional.
    """
    q = np.asarray(q0, dtype=float)
    v = np.asarray(v0, dtype=float)
    if q.ndim != 2 or q.shape != v.shape:
        raise ShapeError(f"q0, v0: expected equal shapes (B, n), got {q.shape} and {v.shape}")
    n = q.shape[1]
    qs = np.empty((n_steps + 1, *q.shape))
    vs = np.empty_like(qs)
    qs[0], vs[0] = q, v
    f = second_order_derivative(a, n)
    x = np.concatenate([q, v], axis=1)
    for k in range(n_steps):  # time stepping is sequential; the batch axis is vectorised
        t = t0_s + k * step_s
        if method is Method.SYMPLECTIC:
            q, v = symplectic_euler_step(a, t, q, v, step_s)
        else:
            x = rk4_step(f, t, x, step_s) if method is Method.RK4 else heun_step(f, t, x, step_s)
            q, v = x[:, :n], x[:, n:]
        qs[k + 1], vs[k + 1] = q, v
    return qs, vs


def lag_factor(time_constant_s: Array | float, step_s: float) -> Array:
    """alpha = exp(-h / T) of the zero-order-hold first-order lag (Franklin-Powell-Workman 1998, eq. 4.59)."""
    return np.exp(-step_s / np.asarray(time_constant_s, dtype=float))

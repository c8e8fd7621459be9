"""Forward kinematics with memory, for the plant: a time-stepped simulation asks for nearby poses in order.

The hexapod's rigid model reaches its platform pose from leg lengths q by Newton's method
(:meth:`shadow.robots.hexapod.HexapodModel.solve_forward_kinematics`), started from the home pose, and every
actuator-space call (mass matrix, bias efforts, Jacobian) solves it again. A plant evaluates M and h at the same q
within a stage and at poses a fraction of a millimetre apart from one stage to the next, so
:class:`WarmStartHexapod` remembers the last solution: the same q (bit for bit) returns it again, and a q within
``warm_start_limit_m`` of it (every leg) starts Newton's method there instead of at home. Newton's method converges
quadratically near the solution (Dennis and Schnabel, *Numerical Methods for Unconstrained Optimization and
Nonlinear Equations*, 1983, Thm. 5.2.1), so one or two steps reach the same tolerance (1e-12 m by default) that the
cold start reaches in more; the pose found is the model's to within that tolerance, the physics is unchanged.

Symbols as in :mod:`shadow.robots.hexapod`: q (N, 6) leg lengths [m], p (N, 3) [m], R (N, 3, 3).
"""

from __future__ import annotations

import numpy as np
from numpy.typing import NDArray

from shadow.errors import ConfigurationError
from shadow.robots.delta import DeltaModel
from shadow.robots.hexapod import DEFAULT_MAX_CONDITION, HexapodModel
from shadow.robots.parameters import HexapodParameters

Array = NDArray[np.float64]


class WarmStartHexapod(HexapodModel):
    """:class:`HexapodModel` whose forward kinematics starts from the last pose it found (see the module docstring).

    Parameters
    ----------
    params, max_condition : as for :class:`HexapodModel`
    warm_start_limit_m : largest leg-length change [m] from the remembered q for which Newton's method starts at
        the remembered pose; beyond it (or for another row count) it starts at home, as the base model does.
    """

    def __init__(
        self,
        params: HexapodParameters,
        *,
        max_condition: float = DEFAULT_MAX_CONDITION,
        warm_start_limit_m: float = 5e-3,
    ) -> None:
        super().__init__(params, max_condition=max_condition)
        if not warm_start_limit_m >= 0.0:
            raise ConfigurationError(f"warm_start_limit_m: must be non-negative, got {warm_start_limit_m}")
        self.warm_start_limit_m = float(warm_start_limit_m)
        self._last: tuple[Array, Array, Array] | None = None  # (q, p, R) of the last default-tolerance solution

    def forward_kinematics(
        self,
        q: Array,
        *,
        initial_p: Array | None = None,
        initial_R: Array | None = None,
        tolerance_m: float = 1e-12,
        max_iterations: int = 50,
    ) -> tuple[Array, Array]:
        """(p (N, 3), R (N, 3, 3)) for leg lengths q (N, 6); remembered or warm-started when no start is given."""
        q = np.asarray(q, dtype=float)
        default = initial_p is None and initial_R is None and tolerance_m == 1e-12
        last = self._last
        if default and last is not None and last[0].shape == q.shape:
            if np.array_equal(q, last[0]):
                return last[1].copy(), last[2].copy()
            if np.abs(q - last[0]).max() <= self.warm_start_limit_m:
                initial_p, initial_R = last[1], last[2]
        p, R = super().forward_kinematics(
            q, initial_p=initial_p, initial_R=initial_R, tolerance_m=tolerance_m, max_iterations=max_iterations
        )
        if default:
            self._last = (q.copy(), p.copy(), R.copy())
        return p, R


def plant_mechanism(model: DeltaModel | HexapodModel) -> DeltaModel | HexapodModel:
    """The rigid model a plant should integrate: a hexapod gets :class:`WarmStartHexapod`, a delta is returned as is
    (its forward kinematics is closed-form)."""
    if isinstance(model, HexapodModel) and not isinstance(model, WarmStartHexapod):
        return WarmStartHexapod(model.params, max_condition=model.max_condition)
    return model

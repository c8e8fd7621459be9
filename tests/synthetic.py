"""Synthetic delta streams from the project's rigid model: prescribed motion, known friction, noise, impacts.

For tests of the monitor and the service, where the truth must be known exactly. The full plant (with
the effects the estimator does not model) is in simulators/.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from shadow.ingest.wire import PositionUnit, SampleBatch
from shadow.robots.description import RobotDescription, build_model, load_description
from shadow.robots.friction import friction_effort
from shadow.robots.parameters import MeasuredQuantity

Array = NDArray[np.float64]
EXAMPLE_DELTA = "shadow/examples/delta_packaging.toml"
EPOCH_S = 1_800_000_000.0  # 2027-01-15, an arbitrary start of the stream


@dataclass(frozen=True)
class SyntheticStream:
    description: RobotDescription
    t: Array
    q: Array
    effort: Array
    gripping: NDArray[np.bool_]
    friction: Array  # theta_f used
    impact_force_n: Array  # (N, 3) platform force applied

    def batches(self, robot: str, samples_per_batch: int, *, first_seq: int = 0) -> list[SampleBatch]:
        out = []
        for k, s in enumerate(range(0, self.t.shape[0], samples_per_batch)):
            e = slice(s, s + samples_per_batch)
            out.append(
                SampleBatch(
                    robot_id=robot,
                    seq=first_seq + k,
                    position_unit=PositionUnit.RAD,
                    effort_kind=MeasuredQuantity.EFFORT,
                    t=self.t[e],
                    q=self.q[e],
                    effort=self.effort[e],
                    gripping=self.gripping[e],
                )
            )
        return out


def delta_stream(
    rng: np.random.Generator,
    *,
    duration_s: float = 20.0,
    rate_hz: float = 1000.0,
    impact_at_s: float | None = None,
    impact_peak_n: float = 60.0,
    impact_duration_s: float = 0.03,
    noise_rated_fraction: float = 0.005,
    transfer_masses_kg: dict[int, float] | None = None,
    coulomb_ramp: tuple[int, float] | None = None,
) -> SyntheticStream:
    """Sum-of-sines joint motion around home, tool cycling every second, optional half-sine impact along +x.

    The tool grips for 1 s every 2 s (transfer k from 2 k to 2 k + 1 s) and carries the described work piece,
    or ``transfer_masses_kg[k]`` for the transfers listed there. ``coulomb_ramp = (i, f)`` raises actuator i's
    Coulomb friction linearly from its value to f times it over the stream (wear).
    """
    d = load_description(EXAMPLE_DELTA)
    m = build_model(d)
    t_rel = np.arange(int(round(duration_s * rate_hz))) / rate_hz
    home = m.inverse_kinematics(np.array([[0.0, 0.0, -0.8]]))[0]
    w = 2 * np.pi * np.array([0.7, 0.9, 1.1])
    q = home + 0.25 * np.sin(w * t_rel[:, None])
    qd = 0.25 * w * np.cos(w * t_rel[:, None])
    qdd = -0.25 * w**2 * np.sin(w * t_rel[:, None])
    grip = np.sin(2 * np.pi * 0.5 * t_rel) > 0
    tool = d.tool
    carried = np.full(t_rel.shape[0], tool.work_piece_mass_kg)  # type: ignore[union-attr]
    for k, mass in (transfer_masses_kg or {}).items():
        carried[(t_rel >= 2.0 * k) & (t_rel < 2.0 * k + 2.0)] = mass
    theta = tool.tool_mass_kg + carried * grip  # type: ignore[union-attr]
    tau0 = m.inverse_dynamics(q, qd, qdd, np.zeros(1))
    tau1 = m.inverse_dynamics(q, qd, qdd, np.ones(1))
    tau = tau0 + (tau1 - tau0) * theta[:, None]  # ID is affine in the payload mass
    v_st = d.friction.stribeck_velocity if d.friction else None
    # in the description's friction form (Coulomb, viscous, offset(, Stribeck level 0: no breakaway hump))
    theta_f = np.tile([1.5, 0.3, 0.1] + ([] if v_st is None else [0.0]), 3)
    k = theta_f.shape[0] // 3
    smooth = d.friction.smooth_velocity if d.friction else 0.02
    tau = tau + friction_effort(qd, theta_f, smooth_velocity=smooth, stribeck_velocity=v_st)
    if coulomb_ramp is not None:  # the extra Coulomb friction of a wearing actuator: (f - 1) F_c t / T tanh(qd / v_s)
        i, factor = coulomb_ramp
        tau[:, i] += (factor - 1.0) * theta_f[k * i] * (t_rel / t_rel[-1]) * np.tanh(qd[:, i] / smooth)
    force = np.zeros((t_rel.shape[0], 3))
    if impact_at_s is not None:
        k = (t_rel >= impact_at_s) & (t_rel < impact_at_s + impact_duration_s)
        force[k, 0] = impact_peak_n * np.sin(np.pi * (t_rel[k] - impact_at_s) / impact_duration_s)
    J = m.platform_jacobian(q)
    tau = tau - np.einsum("nki,nk->ni", J, force)  # M qdd + h = tau + J^T f, motion prescribed
    rated = np.array([dr.rated_effort for dr in d.parameters.drives])
    tau = tau + rng.normal(0.0, noise_rated_fraction * rated, tau.shape)
    return SyntheticStream(d, EPOCH_S + t_rel, q, tau, grip, theta_f, force)

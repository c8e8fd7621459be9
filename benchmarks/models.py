"""Throughput of the robot models: batched numpy against Pinocchio sample by sample, in the same run.

Run from the repository root: ``python -m benchmarks.models [--batch 1000] [--reference-samples 100]``.

For each shipped example robot, one "sample" is: kinematics of a platform motion (actuator positions,
velocities, accelerations), the rigid-body inverse dynamics, the payload regressor and the friction
regressor. Ours runs in batches of ``--batch`` samples; the Pinocchio reference (tests/reference,
closed chains with loop-closure constraints) computes only the inverse dynamics, one sample per
call, so its figure flatters it. Our own model called one sample at a time is printed as well.
Figures vary from run to run on a shared machine; the ratios compare numbers from this one run.
"""

from __future__ import annotations

import argparse
import time
from collections.abc import Callable

import numpy as np

from shadow.robots.delta import DeltaModel
from shadow.robots.description import EXAMPLES_DIR, build_model, load_description
from shadow.robots.friction import friction_regressor
from shadow.robots.hexapod import HexapodModel
from shadow.robots.rotations import (
    angular_acceleration_from_xyz_rates,
    angular_velocity_from_xyz_rates,
    rotation_from_xyz_angles,
)
from tests.reference.pinocchio_delta import PinocchioDelta
from tests.reference.pinocchio_hexapod import PinocchioHexapod

Array = np.ndarray
GOAL_RATIO = 50.0


def best_time_s(fn: Callable[[], object], *, repeats: int, budget_s: float) -> float:
    """Shortest wall time of ``fn`` over up to ``repeats`` calls (stops early once ``budget_s`` is spent)."""
    best = np.inf
    started = time.perf_counter()
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t0)
        if time.perf_counter() - started > budget_s:
            break
    return best


def sines(t: Array, amplitude: Array, frequency_hz: Array) -> tuple[Array, Array, Array]:
    """a sin(w t + k) per column with its first two derivatives, (N, k) each."""
    w = 2.0 * np.pi * frequency_hz
    phase = w * t[:, None] + np.arange(len(amplitude))
    return amplitude * np.sin(phase), amplitude * w * np.cos(phase), -amplitude * w**2 * np.sin(phase)


def delta_case(batch: int) -> tuple[str, Callable[[], object], Callable[[int], object], Callable[[int], object], int]:
    description = load_description(EXAMPLES_DIR / "delta_packaging.toml")
    model = build_model(description)
    assert isinstance(model, DeltaModel)
    theta = description.tool.payload_parameters(gripping=True)
    t = np.linspace(0.0, 1.0, batch)
    dx, xd, xdd = sines(t, np.array([0.15, 0.12, 0.05]), np.array([1.3, 0.9, 2.1]))
    x = description.home_position_m + dx
    v_s = description.friction.smooth_velocity if description.friction else 0.01

    def ours() -> object:
        q, qd, qdd, tau = model.inverse_dynamics_from_platform(x, xd, xdd, theta)  # kinematics + dynamics
        model.rigid_regressor(q, qd, qdd)
        return friction_regressor(qd, smooth_velocity=v_s)

    q, qd, qdd, _ = model.inverse_dynamics_from_platform(x, xd, xdd, theta)

    def ours_one(k: int) -> object:
        s = slice(k, k + 1)
        q1, qd1, qdd1, _ = model.inverse_dynamics_from_platform(x[s], xd[s], xdd[s], theta)
        model.rigid_regressor(q1, qd1, qdd1)
        return friction_regressor(qd1, smooth_velocity=v_s)

    reference = PinocchioDelta(description.parameters, float(theta[0]))

    def pinocchio_one(k: int) -> object:
        return reference.inverse_dynamics(q[k], qd[k], qdd[k])

    return "delta", ours, ours_one, pinocchio_one, batch


def hexapod_case(
    batch: int,
) -> tuple[str, Callable[[], object], Callable[[int], object], Callable[[int], object], int]:
    description = load_description(EXAMPLES_DIR / "hexapod_inspection.toml")
    model = build_model(description)
    assert isinstance(model, HexapodModel)
    fixture = description.tool
    theta = fixture.payload_parameters()
    t = np.linspace(0.0, 1.0, batch)
    motion, rate, accel_ = sines(
        t, np.array([0.03, 0.03, 0.02, 0.08, 0.08, 0.15]), np.array([1.1, 0.7, 1.9, 0.8, 1.3, 0.5])
    )
    p, pd, pdd = description.home_position_m + motion[:, :3], rate[:, :3], accel_[:, :3]
    rpy, rpy_d, rpy_dd = motion[:, 3:], rate[:, 3:], accel_[:, 3:]
    v_s = description.friction.smooth_velocity if description.friction else 5e-4

    def platform(s: slice) -> tuple[Array, Array, Array, Array]:
        R = rotation_from_xyz_angles(rpy[s])
        twist = np.concatenate([pd[s], angular_velocity_from_xyz_rates(rpy[s], rpy_d[s])], axis=1)
        acc = np.concatenate([pdd[s], angular_acceleration_from_xyz_rates(rpy[s], rpy_d[s], rpy_dd[s])], axis=1)
        return p[s], R, twist, acc

    def run(s: slice) -> object:
        pose = platform(s)
        _, qd, _ = model.actuator_motion(*pose)  # kinematics
        tau_known, y_p = model.rigid_regressor_from_platform(*pose)
        tau = tau_known + y_p @ theta  # the inverse dynamics, from the same terms as the model's own call
        return tau, friction_regressor(qd, smooth_velocity=v_s)

    q, qd, qdd = model.actuator_motion(*platform(slice(None)))
    reference = PinocchioHexapod(description.parameters, fixture.payload)

    def pinocchio_one(k: int) -> object:
        return reference.inverse_dynamics(q[k], qd[k], qdd[k])

    return "hexapod", lambda: run(slice(None)), lambda k: run(slice(k, k + 1)), pinocchio_one, batch


def main() -> None:
    parser = argparse.ArgumentParser(prog="python -m benchmarks.models", description=__doc__.splitlines()[0])
    parser.add_argument("--batch", type=int, default=1000, help="samples per batch (default 1000)")
    parser.add_argument("--reference-samples", type=int, default=100, help="samples timed one by one (default 100)")
    args = parser.parse_args()
    n_ref = min(args.reference_samples, args.batch)
    print(f"kinematics + inverse dynamics + payload and friction regressors; batch of {args.batch} samples")
    print(f"{'robot':8} {'ours, batch':>16} {'ours, 1 by 1':>16} {'Pinocchio, 1 by 1':>18} {'batch / Pinocchio':>18}")
    for make in (delta_case, hexapod_case):
        name, ours, ours_one, pinocchio_one, batch = make(args.batch)
        ours()  # warm up
        batch_s = best_time_s(ours, repeats=20, budget_s=5.0)
        one_s = best_time_s(lambda f=ours_one: [f(k) for k in range(n_ref)], repeats=3, budget_s=5.0)
        ref_s = best_time_s(lambda f=pinocchio_one: [f(k) for k in range(n_ref)], repeats=2, budget_s=10.0)
        rate_batch, rate_one, rate_ref = batch / batch_s, n_ref / one_s, n_ref / ref_s
        ratio = rate_batch / rate_ref
        verdict = "meets" if ratio >= GOAL_RATIO else "misses"
        print(
            f"{name:8} {rate_batch:12,.0f} /s {rate_one:12,.0f} /s {rate_ref:14,.0f} /s {ratio:14,.0f} x"
            f"   ({verdict} the {GOAL_RATIO:g}x goal)"
        )


if __name__ == "__main__":
    main()

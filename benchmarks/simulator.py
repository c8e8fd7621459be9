"""Simulated seconds per wall second of the closed-loop simulator, delta and hexapod, 1 kHz output.

Run as ``python -m benchmarks.simulator`` (add ``--quick`` for a shorter run). For each robot and set-up it
prints the batch size B, internal rate, how often M is evaluated, wall time, and the throughput
``B * simulated seconds / wall seconds`` (one core; numpy may use a second thread for the small solves),
plus the accuracy of the cheaper set-ups against the first set-up of the same batch size and robot (RK4 at
the finest internal rate tried, M at every stage), measured in the same run: the largest load-side joint
difference over the run [rad | m].
"""

from __future__ import annotations

import argparse
import time

import numpy as np

from shadow.robots.description import example_paths, load_description
from simulators.plant import MassUpdate
from simulators.run import DemoEffects, delta_reference, demo_loop, hexapod_reference, run_closed_loop
from simulators.trajectories import delta_pick_place, hexapod_multisine, hexapod_positioning

STEP_S = 1e-3


def _delta_case(n_batch: int, duration_s: float, rng: np.random.Generator):
    desc = load_description(next(p for p in example_paths() if "delta" in p.name))
    centre = desc.home_position_m + np.array([-0.15, 0.0, 0.0])
    paths = [
        delta_pick_place(rng, 2, centre_m=centre, tool_mass_kg=desc.tool.tool_mass_kg).path for _ in range(n_batch)
    ]
    t = np.arange(round(duration_s / STEP_S)) * STEP_S

    def reference(plant):
        return delta_reference(plant.mechanism, paths, t)[0]

    return desc, reference, 3


def _hexapod_case(n_batch: int, duration_s: float, rng: np.random.Generator):
    desc = load_description(next(p for p in example_paths() if "hexapod" in p.name))
    home = desc.parameters.home_position_m
    part = desc.tool.payload_parameters()
    t = np.arange(round(duration_s / STEP_S)) * STEP_S
    samples = [
        hexapod_positioning(rng, 2, home_m=home, move_time_s=0.2, dwell_s=0.05, part_parameters=part).sample(t)
        if i % 2 == 0
        else hexapod_multisine(rng, home_m=home).sample(t, part)
        for i in range(n_batch)
    ]

    def reference(plant):
        return hexapod_reference(plant.mechanism, samples)

    return desc, reference, 6


def _run(case, n_batch: int, duration_s: float, substeps: int, update: MassUpdate, coupling_hz: float | None):
    rng = np.random.default_rng(7)
    desc, make_reference, n = case(n_batch, duration_s, rng)
    plant, controller, sensors = demo_loop(
        desc,
        effects=DemoEffects(coupling_frequency_hz=coupling_hz),
        internal_step_s=STEP_S / substeps,
        mass_update=update,
    )
    reference = make_reference(plant)
    start = time.perf_counter()
    rec = run_closed_loop(
        plant,
        controller,
        sensors,
        reference,
        rng,
        sample_step_s=STEP_S,
        substeps=substeps,
        ambient_c=np.full(n_batch, 25.0),
        initial_temperature_c=np.full(n, 30.0),
    )
    wall = time.perf_counter() - start
    return wall, n_batch * reference.q.shape[1] * STEP_S / wall, rec.truth.q


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="shorter runs, fewer set-ups")
    args = parser.parse_args()
    coupling_hz = 40.0
    print(f"closed loop at 1 kHz output, compliant drive train ({coupling_hz:.0f} Hz two-mass mode), friction, heating")
    print(
        f"{'robot':8s} {'B':>5s} {'internal':>9s} {'M update':>12s} {'wall s':>8s} "
        f"{'sim s/wall s':>13s} {'max dq vs ref':>14s}"
    )
    plans = [
        ("delta", _delta_case, 0.25 if args.quick else 0.5, [(64, 4), (256, 4), (256, 2), (256, 1)]),
        ("hexapod", _hexapod_case, 0.1 if args.quick else 0.2, [(64, 1), (256, 1)]),
    ]
    for name, case, duration, setups in plans:
        reference_q: dict[int, np.ndarray] = {}
        for n_batch, substeps in setups:
            updates = [MassUpdate.EVERY_STAGE, MassUpdate.EVERY_STEP]
            for update in updates:
                wall, rate, q = _run(case, n_batch, duration, substeps, update, coupling_hz)
                if n_batch not in reference_q and update is MassUpdate.EVERY_STAGE:
                    reference_q[n_batch] = q  # the first (finest, exact-order) set-up of this batch size
                ref = reference_q.get(n_batch)
                diff = "" if ref is None else f"{np.abs(q - ref).max():.2e}"
                print(
                    f"{name:8s} {n_batch:5d} {substeps:6d} kHz {update.value:>12s} "
                    f"{wall:8.2f} {rate:13.1f} {diff:>14s}",
                    flush=True,
                )


if __name__ == "__main__":
    main()

"""Simulated seconds per wall second of the closed-loop simulator, delta and hexapod, 1 kHz output.

Run as ``OMP_NUM_THREADS=1 python -m benchmarks.simulator`` (add ``--quick`` for a shorter run). For each robot
and set-up it prints the batch size B, internal rate, how often M is evaluated, wall time (the best of
``--repeat`` runs for B = 1, whose few-microsecond numpy calls make single runs noisy), and the throughput
``B * simulated seconds / wall seconds`` (for B = 1 that is the real-time factor of one robot on one core),
plus the accuracy of the cheaper set-ups against the first set-up of the same batch size and robot (RK4 at
the finest internal rate tried, M at every stage), measured in the same run: the largest load-side joint
difference over the run [rad | m], and that difference in encoder counts at the joint (the stated tolerance
is one count: below it the streamed readings cannot tell the set-ups apart).
"""

from __future__ import annotations

import argparse
import time

import numpy as np

from shadow.robots.description import example_paths, load_description
from simulators.effects import encoder_count_size
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
    fixture = desc.tool.payload_parameters()
    part = desc.tool.part.standard_parameters()
    t = np.arange(round(duration_s / STEP_S)) * STEP_S
    samples = [
        hexapod_positioning(
            rng, 2, home_m=home, move_time_s=0.2, dwell_s=0.05, fixture_parameters=fixture, part_parameters=part
        ).sample(t)
        if i % 2 == 0
        else hexapod_multisine(rng, home_m=home).sample(t, fixture)
        for i in range(n_batch)
    ]

    def reference(plant):
        return hexapod_reference(plant.mechanism, samples)

    return desc, reference, 6


def _run(
    case, n_batch: int, duration_s: float, substeps: int, update: MassUpdate, coupling_hz: float | None, repeat: int
):
    walls = []
    for _ in range(repeat):
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
        walls.append(time.perf_counter() - start)
    wall = min(walls)
    count = encoder_count_size(desc.parameters.drives, DemoEffects().counts_per_motor_rev)
    return wall, n_batch * reference.q.shape[1] * STEP_S / wall, rec.truth.q, count


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="shorter runs, fewer set-ups")
    parser.add_argument("--repeat", type=int, default=3, help="runs per B = 1 set-up; the best wall time counts")
    args = parser.parse_args()
    if args.repeat < 1:
        parser.error(f"--repeat: must be at least 1, got {args.repeat}")
    coupling_hz = 40.0
    print(f"closed loop at 1 kHz output, compliant drive train ({coupling_hz:.0f} Hz two-mass mode), friction, heating")
    print(
        f"{'robot':8s} {'B':>5s} {'internal':>9s} {'M update':>12s} {'wall s':>8s} "
        f"{'sim s/wall s':>13s} {'max dq vs ref':>14s} {'counts':>8s}"
    )
    single = [(1, 4), (1, 2), (1, 1)]
    plans = [
        ("delta", _delta_case, 0.25 if args.quick else 0.5, single[1:] if args.quick else single),
        ("hexapod", _hexapod_case, 0.1 if args.quick else 0.2, [(1, 2), (1, 1)]),
        ("delta", _delta_case, 0.25 if args.quick else 0.5, [(64, 4), (256, 4), (256, 2), (256, 1)]),
        ("hexapod", _hexapod_case, 0.1 if args.quick else 0.2, [(64, 1), (256, 1)]),
    ]
    if args.quick:
        plans = plans[:2] + [(name, case, duration, setups[:1]) for name, case, duration, setups in plans[2:]]
    for name, case, duration, setups in plans:
        reference_q: dict[int, np.ndarray] = {}
        for n_batch, substeps in setups:
            updates = [MassUpdate.EVERY_STAGE, MassUpdate.EVERY_STEP]
            for update in updates:
                repeat = args.repeat if n_batch == 1 else 1
                wall, rate, q, count = _run(case, n_batch, duration, substeps, update, coupling_hz, repeat)
                if n_batch not in reference_q and update is MassUpdate.EVERY_STAGE:
                    reference_q[n_batch] = q  # the first (finest, exact-order) set-up of this batch size
                ref = reference_q.get(n_batch)
                gap = None if ref is None else np.abs(q - ref)
                diff = "" if gap is None else f"{gap.max():.2e}"
                counts = "" if gap is None else f"{(gap / count).max():.3f}"
                print(
                    f"{name:8s} {n_batch:5d} {substeps:6d} kHz {update.value:>12s} "
                    f"{wall:8.2f} {rate:13.2f} {diff:>14s} {counts:>8s}",
                    flush=True,
                )


if __name__ == "__main__":
    main()

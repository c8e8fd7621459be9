"""Estimator accuracy on the simulator's data, truth known (printed, not a test).

Run as ``python -m benchmarks.accuracy``. A delta picker is simulated in closed loop (the plant is not the
estimator's model: Stribeck friction, heating drives, current-loop lag, encoder counts, noise) for several
windows without faults; the live monitor follows the stream from the description's nominal baseline (no
commissioning, the hard case) and the figures compare its estimates with the simulator's truth:

* tool mass and the running work-piece mass against the simulated ones;
* every transfer's own mass against the mass the simulator put in the gripper;
* Coulomb and viscous friction against the plant's: its Coulomb level, and its viscous coefficient
  ``b(T) = b_ref exp(-beta (T - T_ref))`` at the drives' mean temperature over the last window (the tracker's
  viscous friction follows the drives as they warm; the temperature law is the plant's own,
  :meth:`simulators.effects.StribeckFriction.viscous`). The estimator's form carries a Stribeck term where the
  description declares one; the plant's breakaway hump is then modelled, else only approximated.
"""

from __future__ import annotations

import dataclasses
import time

import numpy as np

from shadow.monitoring import RobotMonitor
from shadow.robots.description import example_paths, load_description
from shadow.store.repository import StepResults
from simulators.live import KELVIN_OFFSET, FeedSettings, simulate_windows, window_batches
from simulators.run import demo_loop


def main() -> None:
    rng = np.random.default_rng(2026)
    desc = load_description(next(p for p in example_paths() if "delta" in p.name))
    settings = dataclasses.replace(
        FeedSettings(windows_per_run=12, window_s=15.0),
        impact_probability=0.0,
        missed_pick_probability=0.0,
        double_pick_probability=0.0,
    )
    start = time.perf_counter()
    windows = simulate_windows(desc, rng, settings)
    sim_s = time.perf_counter() - start
    monitor = RobotMonitor("bench/accuracy/picker", desc)
    results = StepResults("bench/accuracy/picker")
    t0, seq, true_masses = 1.8e9, 0, []
    start = time.perf_counter()
    for w in windows:
        batches = window_batches(w, "picker", start_s=t0, first_seq=seq, samples_per_batch=10, family="delta")
        for k in range(0, len(batches), 50):
            results.extend(monitor.process_many(batches[k : k + 50]))
        seq += len(batches)
        t0 += float(w.t_s[-1]) + settings.gap_s
        true_masses += w.work_piece_masses_kg
    run_s = time.perf_counter() - start
    n_samples = sum(w.t_s.shape[0] for w in windows)
    print(f"simulated {n_samples / 1000:.0f} s of a delta ({len(windows)} windows) in {sim_s:.0f} s; "
          f"monitor {n_samples / run_s:,.0f} samples/s")  # fmt: skip

    est: dict[str, list[tuple[float, float, float]]] = {}
    for e in results.estimates:
        est.setdefault(e["parameter"], []).append((e["time_s"], e["value"], e["std"]))
    tool_true = desc.tool.tool_mass_kg  # type: ignore[union-attr]
    t_start = results.estimates[0]["time_s"]

    def settle_time(name: str, truth: float, tol: float) -> float:
        series = est[name]
        bad = [t for t, v, _ in series if abs(v - truth) > tol * truth]
        return (bad[-1] - t_start) if bad else 0.0

    tool = est["tool_mass"][-1][1]
    work = est["work_piece_mass"][-1][1]
    mean_true = float(np.mean([m for m in true_masses if m > 0]))
    print(f"tool mass        {tool:.4f} kg, truth {tool_true:.4f} kg: error {100 * (tool / tool_true - 1):+.2f} %"
          f" (within 1 % for good after {settle_time('tool_mass', tool_true, 0.01):.0f} s)")  # fmt: skip
    print(f"work-piece mass  {work:.4f} kg, mean of the simulated ones {mean_true:.4f} kg: "
          f"error {100 * (work / mean_true - 1):+.2f} % (within 2 % after "
          f"{settle_time('work_piece_mass', mean_true, 0.02):.0f} s)")  # fmt: skip
    transfers = [v for _, v, _ in est.get("transfer_mass", [])]
    print(f"per-transfer mass: {len(transfers)} transfers judged; spread (std) {np.std(transfers) * 1000:.1f} g, "
          f"mean {np.mean(transfers):.4f} kg; simulated mass std {np.std(true_masses) * 1000:.1f} g")  # fmt: skip
    plant_friction = demo_loop(desc, effects=settings.effects, internal_step_s=settings.sample_step_s)[
        0
    ].config.friction
    if plant_friction is not None:
        last_c = windows[-1].temperature_k.mean(axis=0) - KELVIN_OFFSET  # (n,) [degC]
        viscous_true = np.asarray(plant_friction.viscous(last_c[None]), dtype=float)[0]
        coulomb_true = np.broadcast_to(np.asarray(plant_friction.coulomb, dtype=float), (3,))
        form = "with" if desc.friction is not None and desc.friction.stribeck_velocity is not None else "without"
        print(f"friction ({form} a Stribeck term in the estimator's model):")
        for i in range(3):
            c = est[f"coulomb_{i + 1}"][-1][1]
            v = est[f"viscous_{i + 1}"][-1][1]
            print(f"actuator {i + 1}: Coulomb {c:.3f} vs plant {coulomb_true[i]:.3f} N m "
                  f"({100 * (c / coulomb_true[i] - 1):+.1f} %), viscous {v:.4f} vs plant {viscous_true[i]:.4f} "
                  f"N m s/rad at {last_c[i]:.1f} degC ({100 * (v / viscous_true[i] - 1):+.1f} %)")  # fmt: skip
    events = [e["kind"] for e in results.events]
    print(f"events on this fault-free run: {len(events)} ({', '.join(sorted(set(events))) or 'none'})")


if __name__ == "__main__":
    main()

"""False alarms over a long stretch of normal production: the scoreboard's first row, at 24 simulated hours.

Run as ``python -m benchmarks.false_alarms [--hours H] [--window-s S] [--windows-per-run N] [--seed N]`` (about an hour
per 24 simulated hours on one core: the simulator and the monitor share it about evenly).

The scoreboard's ``production_cycling`` scenario (the example delta, ambient 24 +- 10 degC daily, no faults at
all) is stretched to ``--hours`` of stream: windows of ``--window-s`` spread evenly over ``--days`` (default 4,
so every phase of the temperature cycle is visited several times). The baseline is the one the scoreboard
commissions (its ``commissioning`` scenario, through ``shadow commission``), and the shop practice's reference
cycle and band come from the same healthy windows. Windows stream through the monitor one at a time, so memory
stays bounded whatever the horizon; only the events are kept.

Every event of any kind is a false alarm here. The figure printed beside the count is the rule-of-three 95 %
upper bound (3 / hours) when the count is zero, and the exact Poisson (chi-square) 95 % interval otherwise.
"""

from __future__ import annotations

import argparse
import dataclasses
import os
import tempfile
import time
from collections import Counter
from pathlib import Path

from scipy.stats import chi2

from benchmarks.scoreboard import commission, scenario, segment, simulate
from benchmarks.shop_practice import ReferenceCycle
from shadow.ingest.wire import Released, SequenceTracker
from shadow.monitoring import RobotMonitor, default_settings
from simulators.scenario import generate
from simulators.scenario_file import _window_days

JUDGED_KINDS = ("collision", "payload_fault", "wear")  # what the scoreboard's false-alarm row counts


def poisson_interval_per_24h(count: int, hours: float) -> tuple[float, float]:
    """95 % interval of an alarm rate [1/24 h] from ``count`` alarms in ``hours`` (Garwood's exact interval)."""
    low = 0.0 if count == 0 else chi2.ppf(0.025, 2 * count) / 2.0
    high = chi2.ppf(0.975, 2 * count + 2) / 2.0
    return 24.0 * low / hours, 24.0 * high / hours


def describe(event: dict) -> str:
    """One line for an event: kind, time, and its figures."""
    figures = ", ".join(f"{k} {v}" for k, v in sorted(event.get("figures", {}).items()))[:400]
    return f"{event['kind']} at {event['start_s']:.3f} s ({event.get('summary', '')}; {figures})"


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--hours", type=float, default=24.0, help="simulated hours of production stream")
    parser.add_argument("--days", type=float, default=4.0, help="horizon the windows are spread over [days]")
    parser.add_argument("--window-s", type=float, default=10.0, help="length of one simulated window [s]")
    parser.add_argument("--windows-per-run", type=int, default=64, help="windows simulated side by side")
    parser.add_argument("--progress-every", type=int, default=500, help="print a progress line every N windows")
    parser.add_argument("--stop-after", type=int, help="stop after this many windows (to look at one stretch)")
    parser.add_argument(
        "--seed", type=int, help="seed of the production stream (default: the scenario's; another seed is a new sample)"
    )
    args = parser.parse_args(argv)
    os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
    clock = time.perf_counter()

    com = scenario("commissioning", 1.0)
    healthy, _ = simulate(com)
    settings = default_settings(com.description)
    with tempfile.TemporaryDirectory(prefix="shadow-false-alarms-") as tmp:
        baseline = commission(com, healthy, Path(tmp))
    ref = ReferenceCycle.record(
        [(s.t, s.effort, s.gripping) for s in (segment(com.description, w.batches) for w in healthy)]
    )
    del healthy

    base = scenario("production_cycling", 1.0)
    if args.seed is not None:
        base = dataclasses.replace(base, seed=args.seed)
    windows = max(1, round(args.hours * 3600.0 / args.window_s))
    sampling = dataclasses.replace(
        base.sampling, windows=windows, window_s=args.window_s, spacing="even", windows_per_run=args.windows_per_run
    )
    sc = dataclasses.replace(
        base, horizon_days=args.days, sampling=sampling, window_days=_window_days(sampling, args.days, base.seed)
    )
    monitor = RobotMonitor(sc.robot_id, sc.description, baseline, settings=settings)
    tracker = SequenceTracker(reorder_window=4)
    events: list[dict] = []
    shop_alarms = 0
    samples = 0
    simulate_s = monitor_s = 0.0
    mark = time.perf_counter()
    for k, w in enumerate(generate(sc), start=1):
        now = time.perf_counter()
        simulate_s += now - mark
        released = [e.batch for b in w.batches for e in tracker.push(b) if isinstance(e, Released)]
        for j in range(0, len(released), 50):
            new_events = monitor.process_many(released[j : j + 50]).events
            for e in new_events:  # every event is printed as it comes: none is expected here
                print(f"  window {k - 1} (day {w.truth.day:.3f}): {describe(e)}", flush=True)
            events.extend(new_events)
        mark = time.perf_counter()
        monitor_s += mark - now
        s = segment(sc.description, w.batches)
        samples += s.t.size
        shop_alarms += len(ref.alarms(s.t, s.effort, s.gripping))
        if k % args.progress_every == 0 or k == windows:
            kinds = Counter(e["kind"] for e in events)
            print(
                f"{k}/{windows} windows, {samples * sc.sampling.sample_step_s / 3600.0:.2f} h: events {dict(kinds)}, "
                f"shop {shop_alarms} (simulation {simulate_s:.0f} s, monitor {monitor_s:.0f} s)",
                flush=True,
            )
        mark = time.perf_counter()
        if args.stop_after is not None and k >= args.stop_after:
            break
    events.extend(monitor.flush_events().events)

    hours = samples * sc.sampling.sample_step_s / 3600.0
    kinds = Counter(e["kind"] for e in events)
    judged = sum(kinds[k] for k in JUDGED_KINDS)
    low, high = poisson_interval_per_24h(judged, hours)
    s_low, s_high = poisson_interval_per_24h(shop_alarms, hours)
    print(f"{hours:.2f} simulated hours of normal production, ambient +-10 K, over {args.days:g} days:")
    print(f"  shadow: {judged} false alarms ({', '.join(f'{kinds[k]} {k}' for k in JUDGED_KINDS)}),")
    print(f"          95 % interval {low:.2f} .. {high:.2f} per 24 h (goal <= 1 per 24 h)")
    others = {k: n for k, n in kinds.items() if k not in JUDGED_KINDS}
    print(f"          other events (not judged by the scoreboard's row): {others or 'none'}")
    print(f"  shop practice: {shop_alarms} alarms, 95 % interval {s_low:.1f} .. {s_high:.1f} per 24 h")
    for e in events:
        print(f"    {describe(e)}")
    wall_s = time.perf_counter() - clock
    print(
        f"wall {wall_s:.0f} s (simulation {simulate_s:.0f} s, monitor {monitor_s:.0f} s: "
        f"{hours * 3600.0 / monitor_s:.0f} x real time)"
    )


if __name__ == "__main__":
    main()

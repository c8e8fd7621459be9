"""The scenario scoreboard: seeded scenario files through the real monitor, beside the shop practice.

Run as ``python -m benchmarks.scoreboard [--markdown PATH] [--scale S]`` (about 10 minutes at scale 1 on one
core; ``--scale 0.3`` for a quick look). Every figure is measured in the run that prints it; nothing is carried
over, and the scenario files fix every random draw, so two runs print the same table.

The named set is ``benchmarks/scoreboard_scenarios/*.toml`` (docs/scenario-file.md), all on the example delta:

* ``commissioning``: healthy production in a steady hall. ``shadow commission`` itself turns its recording into
  the baseline (friction, noise, masses, collision thresholds); the shop practice records its reference cycle
  and band from the same windows (:mod:`benchmarks.shop_practice`).
* ``production_cycling``: two days of normal production, ambient +-10 K daily: every event is a false alarm;
  the payload and friction estimates against the plant's truth.
* ``impacts_5`` / ``impacts_15``: one 30 ms half-sine platform force pulse per window, 5 % or 15 % of the rated
  platform force, random direction: detection rate and delay.
* ``pick_faults``: 5 % missed and 5 % double picks among the transfers.
* ``wear_30_days``: actuator 2's Coulomb and viscous friction rise 30 % over 30 days, ambient +-10 K: the day
  the right actuator is flagged, against the day the true friction crossed the first wear level.

Each window is passed through :class:`shadow.ingest.wire.SequenceTracker` and then ``RobotMonitor.process_many``,
as the service does. The plant is not the monitor's model (Stribeck friction, heating drives, current-loop lag,
encoder counts, effort noise, stamp jitter).
"""

from __future__ import annotations

import argparse
import dataclasses
import datetime as dt
import os
import platform
import tempfile
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
from scipy.signal import savgol_filter

from benchmarks.shop_practice import ReferenceCycle
from shadow.cli import main as shadow_main
from shadow.cli.commission import read_baseline_file
from shadow.estimation.baseline import Baseline
from shadow.ingest.wire import Released, SampleBatch, SequenceTracker
from shadow.monitoring import MonitorSettings, RobotMonitor, default_settings
from shadow.robots.description import RobotDescription
from shadow.robots.drives import effort_from_current
from shadow.robots.friction import friction_regressor
from shadow.store.repository import StepResults
from simulators.live import KELVIN_OFFSET
from simulators.publish import RecordingWriter
from simulators.run import DemoEffects, demo_loop
from simulators.scenario import Scenario, ScenarioWindow, generate, load_scenario
from simulators.scenario_file import _window_days

SCENARIO_DIR = Path(__file__).with_name("scoreboard_scenarios")
MATCH_BEFORE_S = 0.005  # an alarm may start this much before the true onset (residual noise) ...
MATCH_AFTER_S = 0.1  # ... and at most this long after it, to count as detecting it
TRANSFER_SLACK_S = 0.05  # a payload verdict may land this long after the transfer's end


@dataclass
class Segment:
    """One window as the shop practice sees it: times [s], joint-side efforts [N m], gripper state."""

    t: np.ndarray
    effort: np.ndarray
    gripping: np.ndarray


@dataclass
class Played:
    """A scenario as played to the monitor: the truth of each window, the monitor's output, the costs."""

    scenario: Scenario
    windows: list[ScenarioWindow]
    segments: list[Segment]
    results: StepResults
    samples: int
    simulate_s: float
    monitor_s: float
    shop: list[tuple[float, float, int]] = field(default_factory=list)  # shop alarms: start, end [s], actuator

    @property
    def hours(self) -> float:
        return self.samples * self.scenario.sampling.sample_step_s / 3600.0

    def events(self, kind: str) -> list[dict[str, Any]]:
        return [e for e in self.results.events if e["kind"] == kind]


def scenario(name: str, scale: float) -> Scenario:
    """A scoreboard scenario with ``scale`` times its windows (at least 2), same horizon and seed."""
    sc = load_scenario(SCENARIO_DIR / f"{name}.toml")
    if scale == 1.0:
        return sc
    sampling = dataclasses.replace(sc.sampling, windows=max(2, round(sc.sampling.windows * scale)))
    return dataclasses.replace(sc, sampling=sampling, window_days=_window_days(sampling, sc.horizon_days, sc.seed))


def segment(description: RobotDescription, batches: list[SampleBatch]) -> Segment:
    t = np.concatenate([b.t for b in batches])
    if batches[0].effort is not None:
        effort = np.concatenate([b.effort for b in batches])  # type: ignore[misc]
    else:
        current = np.concatenate([b.current for b in batches])  # type: ignore[misc]
        effort = effort_from_current(current, description.parameters.drives)
    gripping = np.concatenate([b.gripping for b in batches])  # type: ignore[misc]
    return Segment(t, effort, gripping)


def simulate(sc: Scenario) -> tuple[list[ScenarioWindow], float]:
    start = time.perf_counter()
    windows = list(generate(sc))
    return windows, time.perf_counter() - start


def commission(sc: Scenario, windows: list[ScenarioWindow], workdir: Path) -> Baseline:
    """Write the healthy windows as a recording and run ``shadow commission`` on it."""
    recording, baseline = workdir / "healthy.jsonl", workdir / "baseline.json"
    with RecordingWriter(recording) as out:
        for w in windows:
            for b in w.batches:
                out.write(b)
    args = ["commission", str(sc.description.source), str(recording), "-o", str(baseline), "--robot", sc.robot_id]
    code = shadow_main(args)
    if code != 0:
        raise RuntimeError(f"shadow commission failed with exit code {code}")
    return read_baseline_file(baseline)[0]


def play(sc: Scenario, baseline: Baseline, ref: ReferenceCycle, settings: MonitorSettings) -> Played:
    windows, simulate_s = simulate(sc)
    monitor = RobotMonitor(sc.robot_id, sc.description, baseline, settings=settings)
    tracker = SequenceTracker(reorder_window=4)
    results = StepResults(monitor.robot_id)
    start = time.perf_counter()
    for w in windows:
        released = [e.batch for b in w.batches for e in tracker.push(b) if isinstance(e, Released)]
        for k in range(0, len(released), 50):
            results.extend(monitor.process_many(released[k : k + 50]))
    results.extend(monitor.flush_events())
    monitor_s = time.perf_counter() - start
    segments = [segment(sc.description, w.batches) for w in windows]
    played = Played(sc, windows, segments, results, sum(s.t.size for s in segments), simulate_s, monitor_s)
    played.shop = [(a.start_s, a.end_s, a.actuator) for s in segments for a in ref.alarms(s.t, s.effort, s.gripping)]
    return played


# ------------------------------------------------------------------------------------------- judging
def match_onsets(onsets_s: list[float], starts_s: list[float]) -> tuple[list[float], int]:
    """(delays [s] of the detected onsets, alarms matched to no onset)."""
    used: set[int] = set()
    delays = []
    for onset in onsets_s:
        hits = [k for k, s in enumerate(starts_s) if onset - MATCH_BEFORE_S <= s <= onset + MATCH_AFTER_S]
        if hits:
            used.update(hits)
            delays.append(max(starts_s[hits[0]] - onset, 0.0))
    return delays, len(starts_s) - len(used)


def transfers(played: Played) -> list[tuple[float, float, str]]:
    """Every complete transfer: (gripper closes, opens [s], truth: normal | missed | double)."""
    out = []
    for w, s in zip(played.windows, played.segments, strict=True):
        edges = np.diff(s.gripping.astype(np.int8))
        rises, falls = np.flatnonzero(edges == 1) + 1, np.flatnonzero(edges == -1) + 1
        faults = {f.cycle: f.kind for f in w.truth.pick_faults}
        for k, r in enumerate(rises):
            f = falls[falls > r]
            if f.size == 0 or k >= len(w.truth.carried_work_piece_masses_kg):
                continue  # a transfer cut by the end of the window is judged by neither
            out.append((float(s.t[r]), float(s.t[f[0]]), faults.get(k, "normal")))
    return out


def overlaps(span: tuple[float, float], alarms: list[tuple[float, float]]) -> bool:
    return any(a0 <= span[1] + TRANSFER_SLACK_S and a1 >= span[0] for a0, a1 in alarms)


def first_level_day(played: Played, actuator: int, level: float) -> float | None:
    """The day [since day 0] the true friction factor of ``actuator`` (1-based) reaches ``level`` (interpolated)."""
    days = np.array([w.day for w in played.windows])
    factor = np.array([w.truth.friction.coulomb_factor[actuator - 1] for w in played.windows])
    above = np.flatnonzero(factor >= level)
    if above.size == 0:
        return None
    k = int(above[0])
    if k == 0:
        return float(days[0])
    return float(np.interp(level, factor[k - 1 : k + 1], days[k - 1 : k + 1]))


def pseudo_true_friction(played: Played, settings: MonitorSettings, windows: list[ScenarioWindow]) -> np.ndarray:
    """The estimator's friction parameters that fit the plant's true friction best: (n, k) per actuator.

    The plant's friction (a Stribeck hump, viscous friction that follows the drive temperature,
    :class:`simulators.effects.StribeckFriction`) is not in the estimator's family (Coulomb tanh + viscous + offset),
    so no parameter value reproduces it, and the plant's nominal Coulomb level and mean viscous coefficient are no
    target the estimator can reach. What it can reach is the pseudo-true parameter of the misspecified model (White,
    "Maximum likelihood estimation of misspecified models", Econometrica 50(1), 1982): for a Gaussian likelihood,
    the least-squares projection of the true friction effort onto the estimator's regressor over the motion it saw,
    ``theta* = argmin sum_k (tau_f,true(v_k, T_k) - Y_f(v_k) theta)^2``, per actuator (Y_f is block-diagonal and the
    filter weighs each actuator with one noise variance, so the weight drops out).

    The velocities are the recording's (Savitzky-Golay derivative of the positions with the tracker's window and
    order), the temperatures the streamed drive temperatures, the curve's levels each window's truth; the
    temperature coefficient and smoothing velocity of the plant's curve, which the truth does not carry, come from
    the plant the scenario player builds (:func:`simulators.run.demo_loop` with the default effect sizes).
    """
    desc = played.scenario.description
    plant_friction = demo_loop(desc, effects=DemoEffects(), internal_step_s=played.scenario.sampling.sample_step_s)[
        0
    ].config.friction
    if plant_friction is None:
        raise RuntimeError("demo_loop built a plant without friction")
    k_t = np.asarray(plant_friction.viscosity_temperature_coefficient_per_k, dtype=float)  # beta [1/K]
    v_e = np.asarray(plant_friction.smoothing_velocity, dtype=float)  # [rad/s | m/s]
    tr = settings.tracker
    rows, targets = [], []
    for w in windows:
        t = np.concatenate([b.t for b in w.batches])
        q = np.concatenate([b.q for b in w.batches])
        dt = float(np.median(np.diff(t)))
        v = savgol_filter(q, 2 * tr.half_window + 1, tr.poly_order, deriv=1, delta=dt, axis=0)  # (N, n)
        if all(b.temperature_k is not None for b in w.batches):
            temp_c = np.concatenate([b.temperature_k for b in w.batches]) - KELVIN_OFFSET  # type: ignore[misc]
        else:
            temp_c = np.broadcast_to(np.asarray(w.truth.drive_temperature_mean_c), v.shape)
        f = w.truth.friction
        f_c, f_s, v_s, b_ref = (
            np.asarray(a, dtype=float) for a in (f.coulomb, f.static, f.stribeck_velocity, f.viscous_ref)
        )
        level = f_c + (f_s - f_c) * np.exp(-((v / v_s) ** 2))  # Stribeck level
        b_t = b_ref * np.exp(-k_t * (temp_c - f.reference_temperature_c))  # b(T) = b_ref exp(-beta (T - T_ref))
        targets.append(level * np.tanh(v / v_e) + b_t * v)  # the plant's friction effort (N, n)
        rows.append(friction_regressor(v, smooth_velocity=tr.smooth_velocity, stribeck_velocity=tr.stribeck_velocity))
    Y, tau = np.concatenate(rows), np.concatenate(targets)  # (N, n, k n), (N, n)
    n = tau.shape[1]
    k = Y.shape[2] // n
    theta = np.empty((n, k))
    for i in range(n):  # per actuator: its own block of columns
        theta[i] = np.linalg.lstsq(Y[:, i, i * k : (i + 1) * k], tau[:, i], rcond=None)[0]
    return theta


# ------------------------------------------------------------------------------------------- table
def fmt_rate(k: int, n: int) -> str:
    return f"{k}/{n} ({100.0 * k / n:.0f} %)" if n else "n/a"


def fmt_delay(delays: list[float]) -> str:
    return f"{1000.0 * float(np.median(delays)):.0f} ms" if delays else "n/a"


def fmt_false(count: int, hours: float) -> str:
    """A count of false alarms over ``hours``, with the rule-of-three 95 % upper bound when it is zero."""
    if count == 0:
        return f"0 in {hours:.2f} h (95 % bound {3.0 / hours:.1f} per h)"
    return f"{count} in {hours:.2f} h ({count / hours:.1f} per h)"


def day_of(played: Played, t_s: float) -> float:
    return (t_s - played.scenario.start_s) / 86400.0


def score(baseline: Baseline, settings: MonitorSettings, played: dict[str, Played]) -> list[tuple[str, str, str, str]]:
    rows: list[tuple[str, str, str, str]] = []
    prod = played["production_cycling"]
    false = len(prod.events("collision")) + len(prod.events("payload_fault")) + len(prod.events("wear"))
    kinds = ", ".join(f"{len(prod.events(k))} {k}" for k in ("collision", "payload_fault", "wear"))
    rows.append(
        (
            "false alarms, normal production, ambient +-10 K",
            f"{fmt_false(false, prod.hours)}: {kinds}",
            fmt_false(len(prod.shop), prod.hours),
            "<= 1 per 24 h",
        )
    )
    for name, pct in (("impacts_5", 5), ("impacts_15", 15)):
        p = played[name]
        onsets = [i.start_s for w in p.windows for i in w.truth.impacts]
        delays, extra = match_onsets(onsets, [e["start_s"] for e in p.events("collision")])
        s_delays, s_extra = match_onsets(onsets, [a for a, _, _ in p.shop])
        rows.append(
            (
                f"impacts of {pct} % rated platform force: detected; median delay; unmatched alarms",
                f"{fmt_rate(len(delays), len(onsets))}; {fmt_delay(delays)}; {extra}",
                f"{fmt_rate(len(s_delays), len(onsets))}; {fmt_delay(s_delays)}; {s_extra}",
                ">= 95 %; <= 20 ms",
            )
        )

    p = played["pick_faults"]
    spans = transfers(p)
    faults = p.events("payload_fault")
    verdict = [
        next((e["figures"]["fault"] for e in faults if a <= e["start_s"] <= b + TRANSFER_SLACK_S), None)
        for a, b, _ in spans
    ]
    faulty = [(v, truth) for (_, _, truth), v in zip(spans, verdict, strict=True) if truth != "normal"]
    normal = [v for (_, _, truth), v in zip(spans, verdict, strict=True) if truth == "normal"]
    right = sum(v == f"{truth}_pick" for v, truth in faulty)
    shop_spans = [(a, b) for a, b, _ in p.shop]
    shop_flag = [overlaps((a, b), shop_spans) for a, b, _ in spans]
    shop_faulty = sum(f for f, (_, _, truth) in zip(shop_flag, spans, strict=True) if truth != "normal")
    shop_normal = sum(f for f, (_, _, truth) in zip(shop_flag, spans, strict=True) if truth == "normal")
    rows.append(
        (
            "missed and double picks detected (of the right kind)",
            f"{fmt_rate(sum(v is not None for v, _ in faulty), len(faulty))} ({right} right kind)",
            f"{fmt_rate(shop_faulty, len(faulty))} (no kind)",
            ">= 99 %",
        )
    )
    rows.append(
        (
            "normal transfers flagged",
            fmt_rate(sum(v is not None for v in normal), len(normal)),
            fmt_rate(shop_normal, len(normal)),
            "<= 0.1 %",
        )
    )

    last: dict[str, float] = {}
    for e in prod.results.estimates:
        last[e["parameter"]] = e["value"]
    truth = prod.windows[-1].truth
    carried = [m for w in prod.windows for m in w.truth.carried_work_piece_masses_kg if m > 0]
    # the carried mass is weighed per transfer; the filter's work_piece_mass is a random walk that follows the
    # recent pieces (the pieces scatter by their tolerance), so the mean over production is that of the transfers
    weighed = [e["value"] for e in prod.results.estimates if e["parameter"] == "transfer_mass"]
    last_window = [m for m in truth.carried_work_piece_masses_kg if m > 0]
    tool = f"{100 * (last['tool_mass'] / truth.tool_mass_kg - 1):+.1f} %"
    if weighed and carried and last_window:
        mean_error = 100 * (float(np.mean(weighed)) / float(np.mean(carried)) - 1)
        filter_error = 100 * (last["work_piece_mass"] / float(np.mean(last_window)) - 1)
        piece = f"{mean_error:+.1f} % ({len(weighed)} of {len(carried)} weighed; filter {filter_error:+.1f} %)"
    else:
        piece = "n/a (no transfer weighed)"
    rows.append(
        (
            "tool mass, end of production / mean carried mass over production (transfers weighed; the filter's "
            "work-piece mass against the last window's pieces)",
            f"{tool} / {piece}",
            "not estimated",
            "1 % / 2 %",
        )
    )
    n = prod.scenario.description.n_actuators
    fr = truth.friction
    coulomb = [100 * (last[f"coulomb_{i + 1}"] / fr.coulomb[i] - 1) for i in range(n)]
    viscous = [100 * (last[f"viscous_{i + 1}"] / fr.viscous_mean[i] - 1) for i in range(n)]
    rows.append(
        (
            "Coulomb / viscous friction error per actuator, end of production",
            " ".join(f"{c:+.0f}" for c in coulomb) + " % / " + " ".join(f"{v:+.0f}" for v in viscous) + " %",
            "not estimated",
            "5 %",
        )
    )
    # against the pseudo-true parameters of the estimator's (misspecified) friction model, over the last window:
    # a random walk over the hours between windows leaves the filter little memory of earlier ones
    star = pseudo_true_friction(prod, settings, prod.windows[-1:])
    coulomb_s = [100 * (last[f"coulomb_{i + 1}"] / star[i, 0] - 1) for i in range(n)]
    viscous_s = [100 * (last[f"viscous_{i + 1}"] / star[i, 1] - 1) for i in range(n)]
    gap_c = [100 * (star[i, 0] / fr.coulomb[i] - 1) for i in range(n)]
    gap_v = [100 * (star[i, 1] / fr.viscous_mean[i] - 1) for i in range(n)]
    rows.append(
        (
            "the same against the pseudo-true friction (least-squares fit of the plant's curve on the last window's "
            "motion, White 1982); pseudo-true against nominal",
            " ".join(f"{c:+.0f}" for c in coulomb_s)
            + " % / "
            + " ".join(f"{v:+.0f}" for v in viscous_s)
            + " %; "
            + " ".join(f"{c:+.0f}" for c in gap_c)
            + " % / "
            + " ".join(f"{v:+.0f}" for v in gap_v)
            + " %",
            "not estimated",
            "5 %",
        )
    )

    p = played["wear_30_days"]
    worn = p.scenario.wear[0].actuator
    level = settings.wear_levels.thresholds[0]
    crossed = first_level_day(p, worn, level)
    rising = [e for e in p.events("wear") if e["figures"]["level_before"] == ""]
    right_flag = [day_of(p, e["start_s"]) for e in rising if e["figures"]["actuator"] == worn]
    wrong = len([e for e in rising if e["figures"]["actuator"] != worn])
    shop_right = [day_of(p, a) for a, _, i in p.shop if i == worn - 1]
    shop_wrong = len([a for a, _, i in p.shop if i != worn - 1])

    def lead(days: list[float]) -> str:
        if crossed is None:
            return "the truth never crossed"
        if not days:
            return "never flagged"
        return f"day {days[0]:.1f}, {days[0] - crossed:+.1f} days"

    rows.append(
        (
            f"30 % friction rise on actuator {worn} in 30 days: flagged (true crossing of {level:.2f}: "
            + ("never" if crossed is None else f"day {crossed:.1f}")
            + "); flags on other actuators",
            f"{lead(right_flag)}; {wrong}",
            f"{lead(shop_right)}; {shop_wrong}",
            "<= +2 days; 0",
        )
    )
    return rows


def table(rows: list[tuple[str, str, str, str]]) -> tuple[tuple[str, str, str, str], str]:
    header = ("scenario row", "shadow", "shop practice (reference-cycle band)", "goal")
    widths = [max(len(r[i]) for r in [header, *rows]) for i in range(4)]
    lines = [" | ".join(c.ljust(w) for c, w in zip(r, widths, strict=True)) for r in [header, *rows]]
    return header, "\n".join(lines)


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--markdown", type=Path, help="also write the table as Markdown here")
    parser.add_argument("--scale", type=float, default=1.0, help="windows of every scenario, times this")
    args = parser.parse_args(argv)
    os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
    clock = time.perf_counter()
    settings = default_settings(load_scenario(SCENARIO_DIR / "commissioning.toml").description)

    com = scenario("commissioning", args.scale)
    healthy, _ = simulate(com)
    with tempfile.TemporaryDirectory(prefix="shadow-scoreboard-") as tmp:
        baseline = commission(com, healthy, Path(tmp))
    ref = ReferenceCycle.record(
        [(s.t, s.effort, s.gripping) for s in (segment(com.description, w.batches) for w in healthy)]
    )
    names = ("production_cycling", "impacts_5", "impacts_15", "pick_faults", "wear_30_days")
    played = {name: play(scenario(name, args.scale), baseline, ref, settings) for name in names}
    rows = score(baseline, settings, played)
    wall_s = time.perf_counter() - clock

    header, text = table(rows)
    print(text)
    sim_s = sum(p.simulate_s for p in played.values())
    mon_s = sum(p.monitor_s for p in played.values())
    hours = sum(p.hours for p in played.values())
    thresholds = np.round(np.asarray(baseline.collision_threshold), 3).tolist()
    print(
        f"{hours * 60:.1f} simulated min in {wall_s:.0f} s (simulation {sim_s:.0f} s, monitor {mon_s:.0f} s, "
        f"{hours * 3600 / mon_s:.0f} x real time); collision thresholds {thresholds} N m"
    )
    if args.markdown:
        stamp = dt.datetime.now(dt.UTC).strftime("%Y-%m-%d")
        md = [
            f"Measured {stamp} on {platform.machine()}, {os.cpu_count()} cores (Python {platform.python_version()}), "
            f"`python -m benchmarks.scoreboard --scale {args.scale:g}`, {hours * 60:.1f} simulated minutes:",
            "",
            "| " + " | ".join(header) + " |",
            "|" + "---|" * 4,
            *["| " + " | ".join(r) + " |" for r in rows],
        ]
        args.markdown.write_text("\n".join(md) + "\n", encoding="utf-8")


if __name__ == "__main__":
    main()

"""Speed of the offline analysis beside the live service's per-message processing, on the same stream.

Run: ``python -m benchmarks.analyze [--duration-s 300]``. The stream is synthetic (tests/synthetic.py: the
example delta's rigid model, invented sinusoidal motion, one impact, 1 kHz), written as a JSON-lines
recording of 10-sample messages. Figures printed:

- reading: the recording parsed and checked (samples/s);
- analysis: RobotMonitor.process_many over blocks of 50 messages, as ``shadow analyze`` runs it;
- live: RobotMonitor.process on each 10-sample message, as the service does when messages arrive one by one;
- the report page built from the analysis;
- memory: ``shadow analyze``'s streamed path (RecordingReader + analyse_stream + the report page) over two
  recordings of different lengths (``--memory-lengths-s``, default 300 s and 1200 s), each in a child process
  that only reads the file, so its peak resident set (VmHWM of /proc/self/status, else ``ru_maxrss``) is that of
  the analysis; the peak must not grow with the length.

Ratios are measured in the same run; figures vary with the machine's load.
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")  # as the shadow command sets it

import tempfile  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402

from shadow.analysis import analyse, analyse_stream  # noqa: E402
from shadow.analysis.recording import RecordingReader, read_recording  # noqa: E402
from shadow.analysis.report import build_report  # noqa: E402
from shadow.ingest.wire import encode_json  # noqa: E402
from shadow.monitoring import RobotMonitor, default_settings  # noqa: E402
from shadow.store.repository import StepResults  # noqa: E402
from tests.synthetic import delta_stream  # noqa: E402

ROBOT = "bench-1"


def _rss_mb() -> float:
    """Peak resident set of this process [MB]: Linux's VmHWM (reset by exec), else ru_maxrss.

    ru_maxrss alone would not do in the child: Linux carries the parent's peak over fork and exec.
    """
    try:
        for line in Path("/proc/self/status").read_text().splitlines():
            if line.startswith("VmHWM:"):
                return float(line.split()[1]) / 1024.0  # kB
    except OSError:
        pass
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0  # Linux: kilobytes


def measure_streamed(path: Path) -> None:
    """Child process: streamed analysis and report of ``path``; prints one JSON line with the figures."""
    import matplotlib.figure  # noqa: F401  (its import is part of the base, not of the run)

    from shadow.robots.description import load_description
    from tests.synthetic import EXAMPLE_DELTA

    description = load_description(EXAMPLE_DELTA)
    base_mb = _rss_mb()
    monitor = RobotMonitor(ROBOT, description, None, default_settings(description))
    t0 = time.perf_counter()
    analysis = analyse_stream(RecordingReader(path, description), monitor, block_messages=50)
    elapsed_s = time.perf_counter() - t0
    build_report(monitor, analysis)
    doc = {"samples": analysis.n_samples, "elapsed_s": elapsed_s, "base_mb": base_mb, "peak_mb": _rss_mb(),
           "events": len(analysis.events)}  # fmt: skip
    print(json.dumps(doc))  # noqa: T201


def memory_figures(lengths_s: list[float]) -> None:
    """Write a recording of each length, analyse each in a child process, print peak memory and speed."""
    rows = []
    with tempfile.TemporaryDirectory(prefix="shadow-bench-mem-") as tmp:
        for length_s in lengths_s:
            stream = delta_stream(np.random.default_rng(1), duration_s=length_s, impact_at_s=length_s / 2)
            path = Path(tmp) / f"run-{length_s:.0f}.jsonl"
            with path.open("wb") as f:
                for b in stream.batches(ROBOT, 10):
                    f.write(encode_json(b) + b"\n")
            size_mb = path.stat().st_size / 1e6
            del stream
            done = subprocess.run(
                [sys.executable, "-m", "benchmarks.analyze", "--measure-streamed", str(path)],
                capture_output=True, text=True, check=True, timeout=3600,
            )  # fmt: skip
            doc = json.loads(done.stdout.strip().splitlines()[-1])
            rows.append((length_s, size_mb, doc))
            print(f"streamed {length_s:6.0f} s ({size_mb:7.1f} MB JSON lines, {doc['samples']} samples): "
                  f"peak RSS {doc['peak_mb']:6.1f} MB ({doc['peak_mb'] - doc['base_mb']:5.1f} MB over the "
                  f"{doc['base_mb']:.0f} MB of the imports), {doc['samples'] / doc['elapsed_s']:10,.0f} samples/s, "
                  f"{doc['events']} events")  # fmt: skip
            os.unlink(path)
    (l0, _, d0), (l1, _, d1) = rows[0], rows[-1]
    print(f"memory over the imports, {l1:.0f} s / {l0:.0f} s: "
          f"{(d1['peak_mb'] - d1['base_mb']) / max(d0['peak_mb'] - d0['base_mb'], 1e-9):.2f} x for "
          f"{l1 / l0:.0f} x the length; peak RSS {d1['peak_mb'] / d0['peak_mb']:.2f} x")  # fmt: skip


def main() -> None:
    parser = argparse.ArgumentParser(prog="python -m benchmarks.analyze", description=__doc__)
    parser.add_argument("--duration-s", type=float, default=300.0, help="length of the synthetic run (default 300)")
    parser.add_argument(
        "--memory-lengths-s",
        type=float,
        nargs=2,
        default=[300.0, 1200.0],
        metavar=("S1", "S2"),
        help="lengths of the two recordings for the memory figures (default 300 1200)",
    )
    parser.add_argument("--measure-streamed", type=Path, metavar="FILE", help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.measure_streamed is not None:
        measure_streamed(args.measure_streamed)
        return
    print(f"OPENBLAS_NUM_THREADS={os.environ.get('OPENBLAS_NUM_THREADS')}")
    t0 = time.perf_counter()
    stream = delta_stream(np.random.default_rng(1), duration_s=args.duration_s, impact_at_s=args.duration_s / 2)
    batches = stream.batches(ROBOT, 10)
    print(f"synthetic delta run: {stream.t.shape[0]} samples, {len(batches)} messages "
          f"({time.perf_counter() - t0:.1f} s to make)")  # fmt: skip
    description = stream.description
    with tempfile.TemporaryDirectory(prefix="shadow-bench-") as tmp:
        path = Path(tmp) / "run.jsonl"
        path.write_bytes(b"".join(encode_json(b) + b"\n" for b in batches))
        size_mb = path.stat().st_size / 1e6
        t0 = time.perf_counter()
        rec = read_recording(path, description)
        read_s = time.perf_counter() - t0
    n = rec.n_samples
    print(f"reading  {size_mb:7.1f} MB JSON lines: {read_s:6.2f} s  {n / read_s:10,.0f} samples/s")

    monitor = RobotMonitor(ROBOT, description, None, default_settings(description))
    analysis = analyse(rec, monitor, block_messages=50)
    offline_rate = analysis.samples_per_s
    print(f"analysis (blocks of 50 messages):  {analysis.elapsed_s:6.2f} s  {offline_rate:10,.0f} samples/s  "
          f"{len(analysis.events)} events")  # fmt: skip

    live = RobotMonitor(ROBOT, description, None, default_settings(description))
    rows = StepResults(ROBOT)
    t0 = time.perf_counter()
    for batch in rec.batches:
        rows.extend(live.process(batch))
    live_s = time.perf_counter() - t0
    live_rate = n / live_s
    print(f"live     (one 10-sample message):  {live_s:6.2f} s  {live_rate:10,.0f} samples/s  "
          f"{len(rows.events)} events")  # fmt: skip
    print(f"analysis / live: {offline_rate / live_rate:.2f} x;  analysis / real time: "
          f"{offline_rate / 1000.0:.1f} x;  live / real time: {live_rate / 1000.0:.1f} x")  # fmt: skip

    t0 = time.perf_counter()
    page = build_report(monitor, analysis)
    print(f"report page: {time.perf_counter() - t0:.2f} s, {len(page) / 1e6:.1f} MB")
    del rec, analysis, rows, batches, stream
    memory_figures(list(args.memory_lengths_s))


if __name__ == "__main__":
    main()

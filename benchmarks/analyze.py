"""Speed of the offline analysis beside the live service's per-message processing, on the same stream.

Run: ``python -m benchmarks.analyze [--duration-s 300]``. The stream is synthetic (tests/synthetic.py: the
example delta's rigid model, invented sinusoidal motion, one impact, 1 kHz), written as a JSON-lines
recording of 10-sample messages. Figures printed:

- reading: the recording parsed and checked (samples/s);
- analysis: RobotMonitor.process_many over blocks of 50 messages, as ``shadow analyze`` runs it;
- live: RobotMonitor.process on each 10-sample message, as the service does when messages arrive one by one;
- the report page built from the analysis.

Ratios are measured in the same run; figures vary with the machine's load.
"""

from __future__ import annotations

import argparse
import os

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")  # as the shadow command sets it

import tempfile  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402

from shadow.analysis import analyse  # noqa: E402
from shadow.analysis.recording import read_recording  # noqa: E402
from shadow.analysis.report import build_report  # noqa: E402
from shadow.ingest.wire import encode_json  # noqa: E402
from shadow.monitoring import RobotMonitor, default_settings  # noqa: E402
from shadow.store.repository import StepResults  # noqa: E402
from tests.synthetic import delta_stream  # noqa: E402

ROBOT = "bench-1"


def main() -> None:
    parser = argparse.ArgumentParser(prog="python -m benchmarks.analyze", description=__doc__)
    parser.add_argument("--duration-s", type=float, default=300.0, help="length of the synthetic run (default 300)")
    args = parser.parse_args()
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


if __name__ == "__main__":
    main()

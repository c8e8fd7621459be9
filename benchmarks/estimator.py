"""Throughput of the batched parameter filter and of the whole live tracker, beside a per-sample filterpy loop.

Run: ``python -m benchmarks.estimator``. Figures vary with the machine's load; the ratios are measured in the
same run on the same data. On a busy 2-core machine OpenBLAS's threads fight each other over these small
matrices: compare a run with ``OPENBLAS_NUM_THREADS=1`` (printed in the first line). The data are synthetic
(random regressors; invented sinusoidal motions of the example delta and hexapod).
"""

from __future__ import annotations

import os
import time
from collections.abc import Callable

import numpy as np
from filterpy.kalman import KalmanFilter

from shadow.estimation.baseline import Baseline
from shadow.estimation.kalman import FilterModel, FilterState, kf_step
from shadow.estimation.tracker import PayloadFrictionTracker, TrackerSettings
from shadow.robots.description import build_model, example_paths, load_description
from shadow.robots.friction import friction_effort


def best_of(fn: Callable[[], object], repeats: int = 3) -> float:
    """Shortest wall time of ``repeats`` runs [s]."""
    best = np.inf
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t0)
    return best


def filter_figures(rng: np.random.Generator, p: int, n: int, batch: int, n_batches: int, n_filterpy: int) -> float:
    """Print the batched filter's rate beside filterpy's per-sample loop; returns the latter [samples/s]."""
    model = FilterModel(q_rate=np.full(p, 1e-6), identifiability_std=np.ones(p))
    state0 = FilterState(x=np.zeros(p), P=np.eye(p), R=0.01 * np.eye(n))
    H = rng.normal(size=(n_batches, batch, n, p))
    z = rng.normal(size=(n_batches, batch, n))
    dt = 1e-3

    def batched() -> None:
        s = state0
        for j in range(n_batches):
            s, _ = kf_step(s, H[j], z[j], batch * dt, model)

    Hf = H.reshape(-1, n, p)[:n_filterpy]
    zf = z.reshape(-1, n)[:n_filterpy]

    def per_sample() -> None:
        kf = KalmanFilter(dim_x=p, dim_z=n)
        kf.x = np.zeros((p, 1))
        kf.P = np.eye(p)
        kf.R = 0.01 * np.eye(n)
        kf.F = np.eye(p)
        kf.Q = np.diag(model.q_rate * dt)
        for k in range(n_filterpy):
            kf.predict()
            kf.update(zf[k][:, None], H=Hf[k])

    rate_batched = n_batches * batch / best_of(batched)
    rate_filterpy = n_filterpy / best_of(per_sample)
    print(
        f"filter p={p:2d} n={n} batch={batch:5d}: batched {rate_batched:12,.0f} samples/s | "
        f"filterpy per-sample {rate_filterpy:9,.0f} samples/s | ratio {rate_batched / rate_filterpy:6.1f}x"
    )
    return rate_filterpy


def whole_ratio(rate: float, filterpy_rate: float) -> str:
    """The whole tracker against filterpy's per-sample predict and update alone (no conditioning, no model)."""
    return f"{rate / filterpy_rate:5.1f}x filterpy's per-sample loop (filter alone)"


def tracker_figures(rng: np.random.Generator, duration_s: float, filterpy_rate: float) -> None:
    desc = load_description(next(p for p in example_paths() if "delta" in p.name))
    model = build_model(desc)
    dt = 1e-3
    t = np.arange(int(duration_s / dt)) * dt
    q0 = model.inverse_kinematics(np.array([[0.0, 0.0, -0.8]]))[0]
    w = 2 * np.pi * np.array([0.7, 1.1, 1.3])
    a = np.array([0.3, 0.25, 0.35])
    phase = np.outer(t, w) + np.array([0.0, 1.0, 2.0])
    q, qd, qdd = q0 + a * np.sin(phase), a * w * np.cos(phase), -a * w**2 * np.sin(phase)
    grip = np.floor(t / 0.7) % 2 == 1
    theta_f = np.tile([0.8, 0.15, 0.05], 3)
    tau_known, y_p = model.rigid_regressor(q, qd, qdd)
    effort = (
        tau_known + y_p[:, :, 0] * (0.35 + 0.25 * grip)[:, None] + friction_effort(qd, theta_f, smooth_velocity=0.01)
    )
    effort += 0.05 * rng.normal(size=effort.shape)
    baseline = Baseline(
        friction_parameters=theta_f,
        friction_covariance=np.diag((0.3 * theta_f) ** 2),
        noise_std=np.full(3, 0.05),
        tool_mass_kg=0.35,
        work_piece_mass_kg=0.25,
    )
    settings = TrackerSettings(
        half_window=10,
        poly_order=3,
        max_gap_s=0.01,
        output_period_s=1.0,
        smooth_velocity=0.01,
        payload_prior_std=np.array([0.5, 0.5]),
        payload_walk_std=np.array([1e-3, 1e-3]),
        friction_walk_std=np.full(3, 1e-3),
        payload_resolution=np.array([0.05, 0.05]),
        friction_resolution=np.full(3, 0.05),
        current_loop_bandwidth_hz=np.full(3, 800.0),
        noise_time_constant_s=30.0,
    )

    def run(chunk: int) -> Callable[[], object]:
        def go() -> None:
            tracker = PayloadFrictionTracker(model, settings, baseline)
            for a0 in range(0, t.size, chunk):
                tracker.process(
                    t[a0 : a0 + chunk], q[a0 : a0 + chunk], effort[a0 : a0 + chunk], tool_gripping=grip[a0 : a0 + chunk]
                )

        return go

    for chunk in (100, 1000, 10000):
        rate = t.size / best_of(run(chunk), repeats=2)
        print(
            f"tracker delta, input batches of {chunk:5d} samples: {rate:10,.0f} samples/s "
            f"({rate * dt:6.1f}x real time, {whole_ratio(rate, filterpy_rate)})"
        )


def hexapod_tracker_figures(rng: np.random.Generator, duration_s: float, filterpy_rate: float) -> None:
    desc = load_description(next(p for p in example_paths() if "hexapod" in p.name))
    model = build_model(desc)
    theta_p = desc.tool.payload_parameters()
    q_home = model.inverse_kinematics(np.asarray(desc.home_position_m)[None, :], np.eye(3)[None])[0]
    dt = 1e-3
    t = np.arange(int(duration_s / dt)) * dt
    w = 2 * np.pi * np.array([0.9, 1.3, 1.7, 2.1, 2.3, 2.9])
    phase = np.outer(t, w) + np.arange(6)
    q, qd, qdd = q_home + 0.015 * np.sin(phase), 0.015 * w * np.cos(phase), -0.015 * w**2 * np.sin(phase)
    theta_f = np.tile([25.0, 400.0, 2.0], 6)
    effort = model.inverse_dynamics(q, qd, qdd, theta_p) + friction_effort(qd, theta_f, smooth_velocity=5e-4)
    effort += 0.5 * rng.normal(size=effort.shape)
    baseline = Baseline(
        friction_parameters=theta_f,
        friction_covariance=np.diag((0.1 * theta_f) ** 2),
        noise_std=np.full(6, 0.5),
        tool_mass_kg=3.0,
        work_piece_mass_kg=0.0,
    )
    settings = TrackerSettings(
        half_window=10,
        poly_order=4,
        max_gap_s=0.01,
        output_period_s=1.0,
        smooth_velocity=5e-4,
        payload_prior_std=np.array([2.0, 0.2, 0.2, 0.2, 0.05, 0.05, 0.05, 0.05, 0.05, 0.05]),
        payload_walk_std=np.full(10, 1e-4),
        friction_walk_std=np.array([0.1, 1.0, 0.1]),
        payload_resolution=np.full(10, 0.01),
        friction_resolution=np.array([1.0, 10.0, 1.0]),
        current_loop_bandwidth_hz=np.full(6, 1000.0),
    )

    def go() -> None:
        tracker = PayloadFrictionTracker(model, settings, baseline)
        for a0 in range(0, t.size, 1000):
            tracker.process(t[a0 : a0 + 1000], q[a0 : a0 + 1000], effort[a0 : a0 + 1000])

    rate = t.size / best_of(go, repeats=2)
    print(
        f"tracker hexapod, input batches of  1000 samples: {rate:10,.0f} samples/s ({rate * dt:6.1f}x real time, "
        f"{whole_ratio(rate, filterpy_rate)})"
    )


def main() -> None:
    rng = np.random.default_rng(20261202)
    print(f"OPENBLAS_NUM_THREADS={os.environ.get('OPENBLAS_NUM_THREADS', '(unset)')}")
    delta_fp = filter_figures(rng, p=11, n=3, batch=1000, n_batches=50, n_filterpy=3000)  # 2 payload + 9 friction
    hexapod_fp = filter_figures(rng, p=28, n=6, batch=1000, n_batches=20, n_filterpy=2000)  # 10 payload + 18 friction
    filter_figures(rng, p=11, n=3, batch=100, n_batches=200, n_filterpy=3000)
    tracker_figures(rng, duration_s=20.0, filterpy_rate=delta_fp)
    hexapod_tracker_figures(rng, duration_s=10.0, filterpy_rate=hexapod_fp)


if __name__ == "__main__":
    main()

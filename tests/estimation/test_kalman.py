"""Batched information-form Kalman filter: outside references (filterpy, scipy), consistency, stability."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.linalg
import scipy.stats
from filterpy.kalman import KalmanFilter
from numpy.testing import assert_allclose, assert_array_equal

from shadow.errors import ConfigurationError, ShapeError
from shadow.estimation.kalman import BatchKalmanFilter, FilterModel, FilterState, kf_step, predict, update


def random_spd(rng: np.random.Generator, n: int, scale: float = 1.0) -> np.ndarray:
    A = rng.normal(size=(n, n))
    return scale * (A @ A.T / n + np.eye(n))


def make(rng: np.random.Generator, p: int = 4, n: int = 3, q: float = 0.01, tau_r: float | None = None):
    model = FilterModel(q_rate=np.full(p, q), identifiability_std=np.ones(p), r_time_constant_s=tau_r)
    state = FilterState(x=rng.normal(size=p), P=random_spd(rng, p), R=random_spd(rng, n, 0.1))
    return model, state


@pytest.mark.parametrize("n_samples", [1, 3, 6, 500])
def test_matches_filterpy_sequential(rng: np.random.Generator, n_samples: int) -> None:
    # reference: filterpy.kalman.KalmanFilter, predict once per batch (F = I, Q T), then one update per sample
    p, n = 4, 3
    model, state = make(rng, p, n)
    kf = KalmanFilter(dim_x=p, dim_z=n)
    kf.x = state.x[:, None].copy()
    kf.P = state.P.copy()
    kf.F = np.eye(p)
    for _ in range(4):
        H = rng.normal(size=(n_samples, n, p))
        z = rng.normal(size=(n_samples, n))
        duration = float(rng.uniform(0.1, 2.0))
        state, report = kf_step(state, H, z, duration, model)
        kf.Q = np.diag(model.q_rate * duration)
        kf.predict()
        prior = kf.x[:, 0].copy()
        for k in range(n_samples):
            kf.update(z[k][:, None], R=state.R, H=H[k])  # z as a column when H is passed per call
        assert_allclose(state.x, kf.x[:, 0], rtol=1e-9, atol=1e-9)
        assert_allclose(state.P, kf.P, rtol=1e-9, atol=1e-9)
        assert_allclose(report.prior_residual, z - H @ prior, rtol=1e-9, atol=1e-9)
        assert report.prior_residual.shape == report.posterior_residual.shape == (n_samples, n)
        assert report.dof == n_samples * n


def test_zero_process_noise_vague_prior_is_least_squares(rng: np.random.Generator) -> None:
    # textbook property (Simon, "Optimal State Estimation", 2006, sec. 3.3, from memory): with Q = 0 and a vague
    # prior the Kalman filter is recursive weighted least squares; reference: scipy.linalg.lstsq of the whitened stack
    p, n = 5, 2
    model = FilterModel(q_rate=np.zeros(p), identifiability_std=np.ones(p))
    R = random_spd(rng, n, 0.3)
    state = FilterState(x=np.zeros(p), P=1e10 * np.eye(p), R=R)
    x_true = rng.normal(size=p)
    Hs, zs = [], []
    for n_samples in (7, 50, 1, 200):
        H = rng.normal(size=(n_samples, n, p))
        z = H @ x_true + rng.multivariate_normal(np.zeros(n), R, size=n_samples)
        state, _ = kf_step(state, H, z, 1.0, model)
        Hs.append(H)
        zs.append(z)
    H_all, z_all = np.concatenate(Hs), np.concatenate(zs)
    L = np.linalg.cholesky(R)
    W = scipy.linalg.solve_triangular(L, np.eye(n), lower=True)  # whitening L^-1, R^-1 = W^T W
    A = np.einsum("ij,kjp->kip", W, H_all).reshape(-1, p)
    b = np.einsum("ij,kj->ki", W, z_all).reshape(-1)
    x_ls = scipy.linalg.lstsq(A, b)[0]
    assert_allclose(state.x, x_ls, rtol=1e-7, atol=1e-7)
    assert_allclose(state.P, np.linalg.inv(A.T @ A), rtol=1e-6, atol=1e-12)  # covariance of least squares


def test_nis_matches_dense_formula(rng: np.random.Generator) -> None:
    # e^T S^-1 e with S = H P H^T + blockdiag(R) formed densely and solved by scipy.linalg.solve
    model, state = make(rng)
    H = rng.normal(size=(6, 3, 4))
    z = rng.normal(size=(6, 3))
    pred = predict(state, model, 0.5)
    _, report = update(pred, H, z, model, duration_s=0.5)
    Hs = H.reshape(-1, 4)
    S = Hs @ pred.P @ Hs.T + scipy.linalg.block_diag(*[pred.R] * 6)
    e = (z - H @ pred.x).reshape(-1)
    assert_allclose(report.nis, e @ scipy.linalg.solve(S, e, assume_a="pos"), rtol=1e-10)


def test_time_averaged_nis_within_chi_square_bounds(rng: np.random.Generator) -> None:
    # consistency test of Bar-Shalom, Li and Kirubarajan (2001), sec. 5.4.2 (from memory): for K batches the sum of
    # the NIS is chi-square with sum(dof) degrees of freedom; 95 % two-sided bounds from scipy.stats.chi2
    p, n, n_batches, n_samples = 4, 3, 200, 5
    model, state = make(rng, p, n, q=0.05)
    x_true = state.x + rng.multivariate_normal(np.zeros(p), state.P)
    L_R = np.linalg.cholesky(state.R)
    nis_sum, dof_sum = 0.0, 0
    for _ in range(n_batches):
        duration = 0.2
        x_true = x_true + rng.normal(size=p) * np.sqrt(model.q_rate * duration)  # random walk of the truth
        H = rng.normal(size=(n_samples, n, p))
        z = H @ x_true + rng.normal(size=(n_samples, n)) @ L_R.T
        state, report = kf_step(state, H, z, duration, model)
        nis_sum += report.nis
        dof_sum += report.dof
    lo, hi = scipy.stats.chi2.ppf([0.025, 0.975], dof_sum)
    assert lo < nis_sum < hi


def test_wrapper_equals_loop_over_step(rng: np.random.Generator) -> None:
    model, state = make(rng, tau_r=5.0)
    wrapper = BatchKalmanFilter(model, state)
    batches = [(rng.normal(size=(k, 3, 4)), rng.normal(size=(k, 3)), 0.3 * k) for k in (1, 3, 6, 50)]
    for H, z, duration in batches:
        report = wrapper.step(H, z, duration)
        state, ref = kf_step(state, H, z, duration, model)
        for a, b in ((wrapper.state.x, state.x), (wrapper.state.P, state.P), (wrapper.state.R, state.R)):
            assert_allclose(a, b, rtol=1e-12, atol=1e-12)
        assert_allclose(report.nis, ref.nis, rtol=1e-12)


@pytest.mark.slow
def test_covariance_stays_spd_over_ten_million_samples(rng: np.random.Generator) -> None:
    # 2000 batches of 5000 samples: P symmetric with positive eigenvalues throughout (common practice, no source)
    p, n = 6, 2
    model = FilterModel(q_rate=np.array([1e-6, 1e-8, 0.0, 1e-4, 1e-10, 1e-6]), identifiability_std=np.ones(p))
    state = FilterState(x=np.zeros(p), P=np.eye(p), R=0.01 * np.eye(n))
    scales = np.array([1.0, 10.0, 0.1, 1.0, 100.0, 0.01])  # badly scaled columns
    blocks = [rng.normal(size=(5000, n, p)) * scales for _ in range(8)]
    z = rng.normal(size=(5000, n))
    min_eig = np.inf
    for j in range(2000):
        state, _ = kf_step(state, blocks[j % 8], z, 5.0, model)
        assert_array_equal(state.P, state.P.T)
        min_eig = min(min_eig, float(np.linalg.eigvalsh(state.P).min()))
    assert min_eig > 0


def test_identifiability_flags(rng: np.random.Generator) -> None:
    p, n = 4, 2
    model = FilterModel(q_rate=np.zeros(p), identifiability_std=np.full(p, 0.1))
    state = FilterState(x=np.zeros(p), P=np.eye(p), R=0.01 * np.eye(n))
    H = rng.normal(size=(200, n, p))
    H[:, :, 1] = 0.0  # parameter 1 not excited at all
    H[:, :, 3] = H[:, :, 2]  # parameters 2 and 3 only excited as a sum
    _, report = kf_step(state, H, rng.normal(size=(200, n)), 1.0, model)
    assert_array_equal(report.identifiable, [True, False, False, False])
    assert report.information_gain[1] == 0.0
    assert report.std[1] == 1.0  # the prior's std, untouched


def test_out_of_bounds_reported_not_clamped(rng: np.random.Generator) -> None:
    model = FilterModel(q_rate=np.zeros(2), identifiability_std=np.ones(2), lower=np.zeros(2), upper=np.full(2, 1.0))
    state = FilterState(x=np.array([0.5, 0.5]), P=np.eye(2), R=np.eye(1))
    H = np.ones((100, 1, 2)) * np.array([1.0, 0.0]) + np.array([0.0, 1.0]) * rng.normal(size=(100, 1, 1))
    z = H @ np.array([-2.0, 3.0])
    state, report = kf_step(state, H, z, 1.0, model)
    assert_array_equal(report.out_of_bounds, [True, True])
    assert state.x[0] < -1.9 and state.x[1] > 2.9


def test_adaptive_noise_converges_to_true_covariance(rng: np.random.Generator) -> None:
    # synthetic data with a known noise covariance; R starts 25x too small and must approach the truth
    p, n = 3, 2
    R_true = np.array([[0.04, 0.01], [0.01, 0.09]])
    model = FilterModel(q_rate=np.full(p, 1e-6), identifiability_std=np.ones(p), r_time_constant_s=20.0)
    state = FilterState(x=np.zeros(p), P=np.eye(p), R=R_true / 25.0)
    x_true = rng.normal(size=p)
    L = np.linalg.cholesky(R_true)
    for _ in range(300):
        H = rng.normal(size=(500, n, p))
        state, _ = kf_step(state, H, H @ x_true + rng.normal(size=(500, n)) @ L.T, 1.0, model)
    assert_allclose(state.R, R_true, rtol=0.05, atol=0.003)
    fixed = FilterModel(q_rate=np.full(p, 1e-6), identifiability_std=np.ones(p))
    s2, _ = kf_step(FilterState(x=np.zeros(p), P=np.eye(p), R=R_true), H, H @ x_true, 1.0, fixed)
    assert_array_equal(s2.R, R_true)


def test_state_round_trip(rng: np.random.Generator) -> None:
    _, state = make(rng)
    back = FilterState.from_dict(state.to_dict())
    for a, b in ((back.x, state.x), (back.P, state.P), (back.R, state.R)):
        assert_array_equal(a, b)


def test_rejects_bad_input(rng: np.random.Generator) -> None:
    model, state = make(rng)
    with pytest.raises(ShapeError, match="H: expected shape"):
        kf_step(state, np.zeros((5, 3, 3)), np.zeros((5, 3)), 1.0, model)
    with pytest.raises(ShapeError, match="z: expected shape"):
        kf_step(state, np.zeros((5, 3, 4)), np.zeros((4, 3)), 1.0, model)
    with pytest.raises(ConfigurationError, match="duration_s"):
        kf_step(state, np.zeros((5, 3, 4)), np.zeros((5, 3)), -1.0, model)
    with pytest.raises(ConfigurationError, match="q_rate"):
        FilterModel(q_rate=np.array([-1.0]), identifiability_std=np.ones(1))

"""Batched Kalman filter of slowly varying linear parameters (payload, friction): pure step functions + wrapper.

The parameters are random walks; each sample of a batch gives one measurement block (Simon, "Optimal State
Estimation", Wiley 2006, sec. 5.1 and 6.2):

    x_j = x_{j-1} + w_j,        w_j ~ N(0, Q T_j)          (between batches j-1 and j, T_j their time distance)
    z_k = H_k x_j + v_k,        v_k ~ N(0, R)              (every sample k of batch j)

The N samples of a batch are folded at once in information form (Simon 2006, sec. 6.2, from memory):

    Lambda = P^-1 + sum_k H_k^T R^-1 H_k                   (posterior information)
    P+     = Lambda^-1                                      (Cholesky solves, never inv)
    x+     = x- + P+ sum_k H_k^T R^-1 (z_k - H_k x-)        (innovation form of eta = P^-1 x + sum H^T R^-1 z)

which equals N sequential Kalman updates with the same H_k and R and no process noise inside the batch. Every
positive-definite prior gives a positive-definite Lambda (a PSD matrix added to a PD one), so P+ stays symmetric
positive definite; it is symmetrised after each solve.

Batch consistency: the normalised innovation squared of the whole batch, with the innovations e_k = z_k - H_k x-
stacked into e (N n,) and S = H P- H^T + blockdiag(R) their covariance, is computed with the matrix inversion lemma
(Simon 2006, sec. 1.1, from memory) in O(N n p^2) instead of O((N n)^3):

    e^T S^-1 e = e^T R^-1 e - g^T P+ g,   g = sum_k H_k^T R^-1 e_k

and is chi-square with N n degrees of freedom on a consistent filter (Bar-Shalom, Li and Kirubarajan,
"Estimation with Applications to Tracking and Navigation", Wiley 2001, sec. 5.4.2, from memory).

Identifiability: the information the batch added about parameter i, correlation with the others included,
is ``1 / P+_ii - 1 / P-_ii`` [1/unit^2]. The parameter counts as excited by the batch when that information is at
least ``1 / identifiability_std_i^2``, i.e. the batch alone would pin it to ``identifiability_std_i`` or better.
Parameters are never clamped: values outside ``[lower, upper]`` are reported in ``out_of_bounds``.

Adaptive measurement noise: after each batch, R moves toward the residual-based estimate (Akhlaghi, Zhou and Huang,
"Adaptive adjustment of noise covariance in Kalman filter for dynamic state estimation", IEEE PES General Meeting
2017, from memory; written here per batch, with a time constant instead of a per-sample factor):

    C = (1/N) sum_k (eps_k eps_k^T + H_k P+ H_k^T),   eps_k = z_k - H_k x+        (posterior residuals)
    R <- (1 - beta) R + beta C,   beta = 1 - exp(-T / tau_R)

C is positive semi-definite, so R stays positive definite. tau_R = None keeps R fixed.

Symbols
-------
p       : number of parameters;  n : measurements per sample (actuators);  N : samples in the batch
x       : (p,) parameter estimate;  P : (p, p) its covariance
Q       : (p,) process-noise rate per parameter, variance per second [unit^2/s] (diagonal)
H       : (N, n, p) regressor blocks;  z : (N, n) measurements;  R : (n, n) measurement noise covariance
T       : duration the random walk is propagated over before the batch [s]
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field

import numpy as np
import scipy.linalg as sla
from numpy.typing import NDArray

from shadow.errors import ConfigurationError, ShapeError, expect_finite, expect_shape

Array = NDArray[np.float64]


def _inf(p: int, sign: float) -> Array:
    return np.full(p, sign * np.inf)


@dataclass(frozen=True, slots=True)
class FilterModel:
    """Fixed settings of the parameter filter.

    q_rate : (p,) random-walk variance rate per parameter [unit^2/s]
    identifiability_std : (p,) a batch excites parameter i if it alone would pin it to this std [unit]
    r_time_constant_s : tau_R of the adaptive measurement noise [s]; None keeps R fixed
    lower, upper : (p,) plausible range, reported (never enforced); default unbounded
    """

    q_rate: Array
    identifiability_std: Array
    r_time_constant_s: float | None = None
    lower: Array = field(default_factory=lambda: np.zeros(0))
    upper: Array = field(default_factory=lambda: np.zeros(0))

    def __post_init__(self) -> None:
        q = np.asarray(self.q_rate, dtype=float)
        expect_shape("q_rate", q, (None,))
        p = q.shape[0]
        object.__setattr__(self, "q_rate", q)
        ident = np.asarray(self.identifiability_std, dtype=float)
        expect_shape("identifiability_std", ident, (p,))
        object.__setattr__(self, "identifiability_std", ident)
        lo = np.asarray(self.lower, dtype=float) if np.size(self.lower) else _inf(p, -1.0)
        hi = np.asarray(self.upper, dtype=float) if np.size(self.upper) else _inf(p, 1.0)
        expect_shape("lower", lo, (p,))
        expect_shape("upper", hi, (p,))
        object.__setattr__(self, "lower", lo)
        object.__setattr__(self, "upper", hi)
        if np.any(q < 0) or not np.all(np.isfinite(q)):
            raise ConfigurationError(f"q_rate: must be finite and >= 0, got {q}")
        if np.any(~(ident > 0)):
            raise ConfigurationError(f"identifiability_std: must be > 0, got {ident}")
        if self.r_time_constant_s is not None and not self.r_time_constant_s > 0:
            raise ConfigurationError(f"r_time_constant_s: must be > 0 or None, got {self.r_time_constant_s}")

    @property
    def n_parameters(self) -> int:
        return int(self.q_rate.shape[0])


@dataclass(frozen=True, slots=True)
class FilterState:
    """What the filter carries between batches: x (p,), P (p, p), R (n, n)."""

    x: Array
    P: Array
    R: Array

    def __post_init__(self) -> None:
        x = np.array(self.x, dtype=float)
        expect_shape("x", x, (None,))
        p = x.shape[0]
        P = np.array(self.P, dtype=float)
        expect_shape("P", P, (p, p))
        R = np.array(self.R, dtype=float)
        expect_shape("R", R, (None, None))
        if R.shape[0] != R.shape[1]:
            raise ShapeError(f"R: expected a square matrix, got {R.shape}")
        for name, a in (("x", x), ("P", P), ("R", R)):
            expect_finite(name, a)
        object.__setattr__(self, "x", x)
        object.__setattr__(self, "P", P)
        object.__setattr__(self, "R", R)

    def to_dict(self) -> dict[str, Array]:
        """Plain arrays (copies); :meth:`from_dict` rebuilds the state exactly."""
        return {"x": self.x.copy(), "P": self.P.copy(), "R": self.R.copy()}

    @classmethod
    def from_dict(cls, d: Mapping[str, Array]) -> FilterState:
        return cls(x=np.asarray(d["x"]), P=np.asarray(d["P"]), R=np.asarray(d["R"]))


@dataclass(frozen=True, slots=True)
class BatchUpdate:
    """What one batch did. Residuals are per sample and actuator; the rest is per parameter."""

    x: Array  # (p,) posterior estimate
    std: Array  # (p,) sqrt(diag P+)
    prior_residual: Array  # (N, n) z - H x-  (innovations)
    posterior_residual: Array  # (N, n) z - H x+
    nis: float  # e^T S^-1 e of the whole batch
    dof: int  # N n, degrees of freedom of nis
    information_gain: Array  # (p,) 1/P+_ii - 1/P-_ii [1/unit^2]
    identifiable: NDArray[np.bool_]  # (p,) information_gain >= 1 / identifiability_std^2
    out_of_bounds: NDArray[np.bool_]  # (p,) x+ outside [lower, upper] (reported, not clamped)
    R_used: Array  # (n, n) measurement covariance the batch was weighed with


def _sym(A: Array) -> Array:
    return 0.5 * (A + A.T)


def predict(state: FilterState, model: FilterModel, duration_s: float) -> FilterState:
    """Random-walk prediction over ``duration_s``: x- = x, P- = P + diag(Q) T (Simon 2006, sec. 5.1, F = I)."""
    if not duration_s >= 0:
        raise ConfigurationError(f"duration_s: must be >= 0, got {duration_s}")
    expect_shape("x", state.x, (model.n_parameters,))
    P = state.P + np.diag(model.q_rate * duration_s)  # P- = P + Q T
    return FilterState(x=state.x, P=P, R=state.R)


def update(
    state: FilterState, H: Array, z: Array, model: FilterModel, *, duration_s: float
) -> tuple[FilterState, BatchUpdate]:
    """Fold the batch (H (N, n, p), z (N, n)) into the predicted state; adapt R over ``duration_s``.

    Returns the posterior state (with the adapted R for the next batch) and the batch report.
    """
    p = model.n_parameters
    n = state.R.shape[0]
    H = np.asarray(H, dtype=float)
    z = np.asarray(z, dtype=float)
    expect_shape("H", H, (None, n, p))
    n_samples = H.shape[0]
    expect_shape("z", z, (n_samples, n))
    expect_finite("H", H)
    expect_finite("z", z)
    x, P = state.x, state.P
    R = state.R

    L_R = np.linalg.cholesky(R)  # R = L_R L_R^T
    W = sla.solve_triangular(L_R, np.eye(n), lower=True, check_finite=False)  # L_R^-1: R^-1 = W^T W
    # whitened regressor rows, actuator-major (row i N + k is actuator i of sample k): one GEMM for all samples
    Hw = (W @ np.ascontiguousarray(H.transpose(1, 0, 2)).reshape(n, n_samples * p)).reshape(n * n_samples, p)
    e = z - (H.reshape(n_samples * n, p) @ x).reshape(n_samples, n)  # innovations e_k = z_k - H_k x-
    ew = (W @ e.T).reshape(n * n_samples)  # whitened innovations, same row order as Hw
    J = Hw.T @ Hw  # sum_k H_k^T R^-1 H_k
    g = Hw.T @ ew  # sum_k H_k^T R^-1 e_k

    c_prior = sla.cho_factor(P, lower=True, check_finite=False)
    info_prior = _sym(sla.cho_solve(c_prior, np.eye(p), check_finite=False))  # P-^-1 by Cholesky solves
    Lam = _sym(info_prior + J)  # Lambda = P-^-1 + sum H^T R^-1 H
    c_post = sla.cho_factor(Lam, lower=True, check_finite=False)
    P_post = _sym(sla.cho_solve(c_post, np.eye(p), check_finite=False))  # P+ = Lambda^-1
    dx = sla.cho_solve(c_post, g, check_finite=False)  # P+ g
    x_post = x + dx  # x+ = x- + P+ sum H^T R^-1 e
    nis = float(ew @ ew - g @ dx)  # e^T S^-1 e = e^T R^-1 e - g^T P+ g (matrix inversion lemma)
    eps = z - (H.reshape(n_samples * n, p) @ x_post).reshape(n_samples, n)  # posterior residuals

    gain = 1.0 / np.diag(P_post) - 1.0 / np.diag(P)  # information added per parameter
    identifiable = gain >= 1.0 / model.identifiability_std**2
    out_of_bounds = (x_post < model.lower) | (x_post > model.upper)

    R_next = R
    if model.r_time_constant_s is not None and n_samples > 0:
        L_post = np.linalg.cholesky(P_post)
        HL = (H.reshape(n_samples * n, p) @ L_post).reshape(n_samples, n, p)  # H_k P+ H_k^T = (H_k L)(H_k L)^T
        C = (eps.T @ eps + np.tensordot(HL, HL, axes=([0, 2], [0, 2]))) / n_samples  # residual-based estimate
        beta = -np.expm1(-duration_s / model.r_time_constant_s)  # beta = 1 - exp(-T / tau_R)
        R_next = _sym((1.0 - beta) * R + beta * C)  # R <- (1 - beta) R + beta C

    report = BatchUpdate(
        x=x_post,
        std=np.sqrt(np.diag(P_post)),
        prior_residual=e,
        posterior_residual=eps,
        nis=nis,
        dof=n_samples * n,
        information_gain=gain,
        identifiable=identifiable,
        out_of_bounds=out_of_bounds,
        R_used=R,
    )
    return FilterState(x=x_post, P=P_post, R=R_next), report


def kf_step(
    state: FilterState, H: Array, z: Array, duration_s: float, model: FilterModel
) -> tuple[FilterState, BatchUpdate]:
    """One batch: random-walk prediction over ``duration_s`` then the batched update. No side effects."""
    return update(predict(state, model, duration_s), H, z, model, duration_s=duration_s)


class BatchKalmanFilter:
    """Carries the filter state between batches; every calculation goes through :func:`kf_step`."""

    def __init__(self, model: FilterModel, state: FilterState) -> None:
        expect_shape("x", state.x, (model.n_parameters,))
        self.model = model
        self.state = state

    def step(self, H: Array, z: Array, duration_s: float) -> BatchUpdate:
        """Predict over ``duration_s``, fold the batch (H (N, n, p), z (N, n)), return the report."""
        self.state, report = kf_step(self.state, H, z, duration_s, self.model)
        return report


def reset_parameter(state: FilterState, index: int, value: float, std: float) -> FilterState:
    """The state after a detected step of one parameter: ``x_i = value`` with variance ``std^2``, uncorrelated.

    A change detector that has found a step (a new tool, a new work piece) tells the filter so, instead of
    waiting for the random walk to carry the estimate over: row and column i of P are cleared and
    ``P_ii = std^2``. A block-diagonal split of a positive definite P with a positive scalar stays positive
    definite, so the filter's invariants hold.
    """
    if not 0 <= index < state.x.shape[0] or not (std > 0.0 and np.isfinite(value)):
        raise ConfigurationError(f"reset_parameter: index {index}, value {value!r}, std {std!r} not usable")
    x = state.x.copy()
    x[index] = value
    P = state.P.copy()
    P[index, :] = 0.0
    P[:, index] = 0.0
    P[index, index] = std**2
    return FilterState(x, P, state.R.copy())

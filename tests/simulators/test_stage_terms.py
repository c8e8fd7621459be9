"""The plant's stage terms (M and h with the kinematics evaluated once) give the rigid models' own values."""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
from numpy.testing import assert_allclose, assert_array_equal

from shadow.errors import ShadowError, UnreachablePoseError
from shadow.robots.delta import DeltaModel
from shadow.robots.description import build_model, example_paths, load_description
from shadow.robots.rotations import exp_rotation
from simulators.kinematics import plant_mechanism
from simulators.stage_terms import DeltaStageTerms, SharedRigidTerms, delta_terms, hexapod_terms


def _description(family: str):
    return load_description(next(p for p in example_paths() if family in p.name))


def _delta_poses(rng: np.random.Generator, n: int) -> tuple[DeltaModel, np.ndarray]:
    desc = _description("delta")
    model = build_model(desc)
    x = np.asarray(desc.home_position_m) + rng.uniform(-0.1, 0.1, size=(n, 3))
    return model, model.inverse_kinematics(x)


@pytest.mark.parametrize("n_rows", [1, 3])
def test_delta_terms_are_the_models_bit_for_bit(rng, n_rows):
    model, q = _delta_poses(rng, n_rows)
    qd = rng.normal(scale=2.0, size=q.shape)
    m, h = delta_terms(model, q, qd, 0.7, need_mass=True)
    assert_array_equal(m, model.mass_matrix(q, np.array([0.7])))
    assert_array_equal(h, model.bias_efforts(q, qd, np.array([0.7])))
    assert delta_terms(model, q, qd, 0.7, need_mass=False)[0] is None


@pytest.mark.parametrize("forearm_model", ["rod", "lumped"])
def test_one_delta_on_floats_matches_the_model(rng, forearm_model):
    base, q_all = _delta_poses(rng, 50)
    model = DeltaModel(base.params, forearm_model=forearm_model)
    terms = DeltaStageTerms(model)
    for q in q_all:
        q = q[None]
        qd = rng.normal(scale=3.0, size=(1, 3))
        m_load = rng.uniform(0.0, 2.0)
        m, h = terms(q, qd, m_load, need_mass=True)
        m_ref = model.mass_matrix(q, np.array([m_load]))
        h_ref = model.bias_efforts(q, qd, np.array([m_load]))
        assert m is not None and h is not None
        assert m.shape == (1, 3, 3) and h.shape == (1, 3)
        # the same equations in another summation order: agreement to rounding
        assert_allclose(m, m_ref, rtol=1e-12, atol=1e-12 * np.abs(m_ref).max())
        assert_allclose(h, h_ref, rtol=1e-12, atol=1e-12 * np.abs(h_ref).max())
        m_only, no_h = terms(q, None, m_load, need_mass=True)
        assert no_h is None
        assert_array_equal(m_only, m)


def test_one_delta_on_floats_refuses_what_the_model_refuses():
    params = build_model(_description("delta")).params
    model = DeltaModel(dataclasses.replace(params, forearm_length_m=0.2))  # too short to close at q = 0
    shared = SharedRigidTerms.for_mechanism(model)
    assert shared is not None
    q = np.zeros((1, 3))
    with pytest.raises(UnreachablePoseError, match="cannot close"):
        model.mass_matrix(q, np.array([0.0]))
    with pytest.raises(UnreachablePoseError, match="cannot close"):
        shared(q, np.zeros((1, 3)), np.array([0.0]), need_mass=True)
    with pytest.raises(UnreachablePoseError, match="cannot close"):
        shared.mass(q, np.array([0.0]))
    with pytest.raises(ShadowError, match="q"):
        shared(np.array([[np.nan, 0.0, 0.0]]), np.zeros((1, 3)), np.array([0.0]), need_mass=True)


def test_hexapod_terms_are_the_models_bit_for_bit(rng):
    desc = _description("hexapod")
    model = plant_mechanism(build_model(desc))
    home = np.asarray(desc.parameters.home_position_m, dtype=float)
    p = home + rng.uniform(-0.01, 0.01, size=(3, 3))
    q = model.inverse_kinematics(p, exp_rotation(rng.uniform(-0.02, 0.02, size=(3, 3))))
    qd = rng.normal(scale=0.05, size=q.shape)
    theta = rng.uniform(0.01, 0.2, size=10)
    m, h = hexapod_terms(model, q, qd, theta, need_mass=True)
    assert_array_equal(m, model.mass_matrix(q, theta))
    assert_array_equal(h, model.bias_efforts(q, qd, theta))


def test_other_mechanisms_have_no_fast_route():
    class Other:  # any Mechanism that is neither model
        pass

    assert SharedRigidTerms.for_mechanism(Other()) is None  # type: ignore[arg-type]

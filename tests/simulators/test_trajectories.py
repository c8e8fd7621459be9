"""Test cycles: exact 25/305/25 mm geometry, continuity of velocity and acceleration, motion-law end conditions."""

from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_allclose

from shadow.errors import ConfigurationError, ShapeError
from shadow.robots.rotations import rotation_from_xyz_angles
from simulators.trajectories import (
    MotionLaw,
    delta_pick_place,
    hexapod_multisine,
    hexapod_positioning,
    motion_law,
    pose_motion,
)

CENTRE = np.array([-0.15, 0.0, -0.75])


@pytest.mark.parametrize("law", list(MotionLaw))
def test_motion_law_boundary_values_and_derivatives(law):
    # rest to rest: s(0) = 0, s(1) = 1, s'(0) = s'(1) = 0, s''(0) = s''(1) = 0 (Biagiotti-Melchiorri 2008)
    s, s1, s2 = motion_law(law, np.array([0.0, 1.0]))
    assert_allclose(s, [0.0, 1.0], atol=1e-15)
    assert_allclose(s1, [0.0, 0.0], atol=1e-15)
    assert_allclose(s2, [0.0, 0.0], atol=1e-12)
    # derivatives against central differences of s (error O(d^2))
    tau = np.linspace(0.05, 0.95, 19)
    d = 1e-5
    assert_allclose(
        motion_law(law, tau)[1],
        (motion_law(law, tau + d)[0] - motion_law(law, tau - d)[0]) / (2 * d),
        rtol=0,
        atol=1e-8,
    )
    assert_allclose(
        motion_law(law, tau)[2],
        (motion_law(law, tau + d)[1] - motion_law(law, tau - d)[1]) / (2 * d),
        rtol=0,
        atol=1e-6,
    )


def test_peak_velocity_of_laws():
    # handbook peak speeds (Biagiotti-Melchiorri 2008, Tab. 3.1, from memory): 3-4-5 1.875, 4-5-6-7 2.1875, cycloidal 2
    tau = np.array([0.5])
    assert_allclose([motion_law(law, tau)[1][0] for law in MotionLaw], [1.875, 2.1875, 2.0], rtol=1e-14)


def test_delta_cycle_geometry(rng):
    cyc = delta_pick_place(rng, 4, centre_m=CENTRE)
    path = cyc.path
    moves = path.displacement[np.linalg.norm(path.displacement, axis=1) > 0]
    assert len(moves) == 4 * 6
    for k in range(4 * 2):  # each half cycle: up, across, down
        up, across, down = moves[3 * k : 3 * k + 3]
        assert_allclose(up, [0, 0, 0.025], rtol=0, atol=1e-15)
        assert_allclose(down, [0, 0, -0.025], rtol=0, atol=1e-15)
        assert_allclose(across[2], 0.0, atol=1e-15)
        assert_allclose(np.linalg.norm(across), 0.305, rtol=1e-14)
    # pick and place points vary, but stay within a few centimetres of their nominal places
    assert np.ptp(cyc.pick_points_m[:, :2], axis=0).max() > 1e-3
    assert np.linalg.norm(cyc.pick_points_m - CENTRE, axis=1).max() < 0.1


def test_delta_cycle_is_smooth(rng):
    path = delta_pick_place(rng, 2, centre_m=CENTRE).path
    t = np.arange(0.0, path.end_s, 1e-4)
    smp = path.sample(t)
    # velocity and acceleration are continuous: increments shrink with the step (no jumps at segment joins)
    assert np.abs(np.diff(smp.xd, axis=0)).max() < 1e-4 * 400.0  # |xdd| < 400 m/s^2 bounds a velocity step
    jerk_bound = np.abs(np.diff(smp.xdd, axis=0)).max() / 1e-4
    assert jerk_bound < 5e4  # finite jerk: acceleration continuous
    # integrating the velocity reproduces the position (trapezoidal rule, O(h^2))
    x_int = smp.x[0] + np.concatenate([[np.zeros(3)], np.cumsum(0.5 * (smp.xd[1:] + smp.xd[:-1]) * 1e-4, axis=0)])
    assert_allclose(x_int, smp.x, rtol=0, atol=1e-6)


def test_delta_cycle_tool_and_payload(rng):
    cyc = delta_pick_place(
        rng, 3, centre_m=CENTRE, tool_mass_kg=0.2, workpiece_mass_mean_kg=0.5, workpiece_mass_std_kg=0.1
    )
    smp = cyc.path.sample(np.arange(0.0, cyc.path.end_s, 1e-3))
    closed = smp.tool
    assert_allclose(smp.theta_p[~closed, 0], 0.2, rtol=1e-15)
    assert_allclose(np.unique(np.round(smp.theta_p[closed, 0] - 0.2, 12)), np.sort(np.round(cyc.workpiece_mass_kg, 12)))
    # three grips: the tool closes three times
    assert np.count_nonzero(np.diff(closed.astype(int)) == 1) == 3
    with pytest.raises(ConfigurationError, match="n_cycles"):
        delta_pick_place(rng, 0, centre_m=CENTRE)


def test_workpiece_mass_distribution(rng):
    cyc = delta_pick_place(rng, 2000, centre_m=CENTRE, workpiece_mass_mean_kg=0.4, workpiece_mass_std_kg=0.03)
    m = cyc.workpiece_mass_kg
    # sample mean and std of 2000 normal draws: standard errors 0.03/sqrt(2000) and 0.03/sqrt(4000)
    assert abs(m.mean() - 0.4) < 4 * 0.03 / np.sqrt(2000)
    assert abs(m.std(ddof=1) - 0.03) < 4 * 0.03 / np.sqrt(4000)


def test_hexapod_motion_matches_finite_differences(rng):
    # twist and acceleration from the angle law against central differences of the pose
    msine = hexapod_multisine(rng, home_m=np.array([0.0, 0.0, 0.35]))
    pos = hexapod_positioning(rng, 3, home_m=np.array([0.0, 0.0, 0.35]), part_parameters=np.arange(1.0, 11.0))
    for sample_at in (lambda t: msine.sample(t, np.zeros(10)), pos.sample):
        t = np.array([0.2, 0.7, 1.1])
        d = 1e-6
        p, rot, twist, accel = pose_motion(sample_at(t))
        p_p, r_p, tw_p, _ = pose_motion(sample_at(t + d))
        p_m, r_m, tw_m, _ = pose_motion(sample_at(t - d))
        assert_allclose(twist[:, :3], (p_p - p_m) / (2 * d), rtol=0, atol=1e-7)
        # [omega]x = dR/dt R^T
        w_skew = np.einsum("nij,nkj->nik", (r_p - r_m) / (2 * d), rot)
        omega = np.stack([w_skew[:, 2, 1], w_skew[:, 0, 2], w_skew[:, 1, 0]], axis=1)
        assert_allclose(twist[:, 3:], omega, rtol=0, atol=1e-7)
        assert_allclose(accel, (tw_p - tw_m) / (2 * d), rtol=0, atol=1e-5)
        assert_allclose(rot, rotation_from_xyz_angles(sample_at(t).x[:, 3:]), atol=1e-15)


def test_hexapod_positioning_loads_and_unloads(rng):
    part = np.arange(1.0, 11.0)
    path = hexapod_positioning(rng, 4, home_m=np.array([0.0, 0.0, 0.35]), part_parameters=part)
    # move, dwell alternate; part loaded at the first dwell, unloaded at the second, ...
    carried = np.all(path.theta_p == part, axis=1)
    assert carried.tolist() == [False, True, True, False, False, True, True, False]
    assert (path.tool == carried).all()


def test_hexapod_positioning_keeps_the_fixture_and_changes_the_part(rng):
    fixture, part = np.linspace(2.0, 3.0, 10), np.arange(1.0, 11.0)
    path = hexapod_positioning(
        rng, 4, home_m=np.array([0.0, 0.0, 0.35]), fixture_parameters=fixture, part_parameters=part
    )
    with_part = np.all(path.theta_p == fixture + part, axis=1)
    fixture_only = np.all(path.theta_p == fixture, axis=1)
    assert (with_part | fixture_only).all() and with_part.any() and fixture_only.any()
    assert (path.tool == with_part).all()  # the tool signal says whether the part is in
    empty = hexapod_positioning(rng, 2, home_m=np.array([0.0, 0.0, 0.35]), fixture_parameters=fixture)
    assert np.all(empty.theta_p == fixture) and not empty.tool.any()
    with pytest.raises(ShapeError, match="fixture_parameters"):
        hexapod_positioning(rng, 2, home_m=np.zeros(3), fixture_parameters=np.zeros(9))

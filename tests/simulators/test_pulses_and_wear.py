"""Pulse profiles, term-wise friction wear factors and the delta cycle's grip times."""

from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_allclose, assert_array_equal

from shadow.errors import ConfigurationError
from simulators.effects import StribeckFriction
from simulators.plant import HalfSinePulse, PulseProfile, ShapedPulse, pulse_shape
from simulators.trajectories import delta_pick_place

# integral of the normalised shape over 0 < phi < 1 (closed forms: 2/pi for sin(pi phi), 1/2 for the haversine
# and the triangle, 1 for the rectangle)
AREAS = {PulseProfile.HALF_SINE: 2.0 / np.pi, PulseProfile.HAVERSINE: 0.5, PulseProfile.TRIANGLE: 0.5,
         PulseProfile.RECTANGLE: 1.0}  # fmt: skip


@pytest.mark.parametrize("profile", list(PulseProfile), ids=lambda p: p.value)
def test_pulse_shapes_peak_at_one_and_have_their_areas(profile: PulseProfile) -> None:
    phi = (np.arange(200_000) + 0.5) / 200_000  # midpoint rule
    shape = pulse_shape(profile, phi)
    assert_allclose(np.mean(shape), AREAS[profile], rtol=1e-6)
    assert pulse_shape(profile, np.array([0.5]))[0] == pytest.approx(1.0)
    assert_array_equal(pulse_shape(profile, np.array([-0.1, 0.0, 1.0, 1.3])), 0.0)


def test_half_sine_shaped_pulse_equals_the_half_sine_pulse() -> None:
    start, duration, peak = np.array([0.1, 0.2]), np.array([0.03, 0.05]), np.array([40.0, 0.0])
    direction = np.array([[1.0, 0.0, 0.0], [0.0, 1.0, 0.0]])
    a = HalfSinePulse(start, duration, peak, direction)
    b = ShapedPulse(start, duration, peak, direction, PulseProfile.HALF_SINE)
    for t in np.linspace(0.0, 0.3, 301):
        wa, wb = a.wrench(t), b.wrench(t)
        assert (wa is None) == (wb is None)
        if wa is not None:
            assert_allclose(wb, wa, rtol=1e-15, atol=0.0)
        assert_array_equal(a.active(t), b.active(t))


def _friction() -> StribeckFriction:
    return StribeckFriction(
        coulomb=np.array([1.0, 2.0, 3.0]),
        static=np.array([1.5, 2.5, 3.5]),
        stribeck_velocity=np.full(3, 0.05),
        viscous_ref=np.array([0.1, 0.2, 0.3]),
        viscosity_temperature_coefficient_per_k=np.full(3, 0.02),
    )


def test_wear_factors_scale_each_term_per_window() -> None:
    base = _friction()
    f_c = np.array([[1.0, 1.5, 1.0], [1.0, 1.0, 1.0]])  # (B, n): window 0 wears actuator 2
    f_s = np.array([[1.0, 1.0, 1.0], [1.0, 1.0, 1.2]])
    f_v = np.array([[1.0, 1.5, 1.0], [2.0, 1.0, 1.0]])
    worn = base.with_factors(coulomb=f_c, static=f_s, viscous=f_v)
    assert_allclose(worn.coulomb, [[1.0, 3.0, 3.0], [1.0, 2.0, 3.0]], rtol=1e-15)
    assert_allclose(worn.static, [[1.5, 3.75, 3.5], [1.5, 2.5, 4.2]], rtol=1e-15)
    assert_allclose(worn.viscous_ref, [[0.1, 0.3, 0.3], [0.2, 0.2, 0.3]], rtol=1e-15)
    v, temp = np.full((2, 3), 0.4), np.full((2, 3), 40.0)
    # at T_ref, high speed: the effort is F_c tanh(v / v_e) + F_s-term (vanishing) + b v
    expected = (
        worn.coulomb * np.tanh(0.4 / 1e-2)
        + (worn.static - worn.coulomb) * np.exp(-((0.4 / 0.05) ** 2))
        + (worn.viscous_ref * 0.4)
    )
    assert_allclose(worn.effort(v, temp), expected, rtol=1e-14)
    with pytest.raises(ConfigurationError, match="static: breakaway level must not be below the Coulomb level"):
        base.with_factors(static=0.5)


def test_grip_times_are_where_the_gripper_closes_and_opens(rng: np.random.Generator) -> None:
    cycles = delta_pick_place(rng, 4, centre_m=np.array([-0.15, 0.0, -0.8]), missed_pick_probability=0.5,
                              double_pick_probability=0.3)  # fmt: skip
    close, release = cycles.grip_times_s()
    t = np.arange(0.0, cycles.path.end_s, 1e-4)
    tool = cycles.path.sample(t).tool
    rising = t[1:][np.diff(tool.astype(int)) == 1]
    falling = t[1:][np.diff(tool.astype(int)) == -1]
    assert_allclose(rising, close, atol=1.1e-4)
    assert_allclose(falling, release, atol=1.1e-4)
    assert not np.any(cycles.missed & cycles.doubled)
    assert_array_equal(cycles.workpiece_mass_kg[cycles.missed], 0.0)
    assert cycles.missed.shape == cycles.doubled.shape == (4,)

"""Motion laws and the test cycles of the simulated robots (platform-space paths).

Symbols
-------
tau        : normalised time in a segment, 0 <= tau <= 1
s, s', s'' : (T,) normalised displacement 0 -> 1 and its derivatives with respect to tau
x, xd, xdd : (T, d) path position, velocity, acceleration (d = 3 for the delta's platform; d = 6 for the
             hexapod: position [m] then fixed-axis XYZ angles [rad])
tool       : (T,) bool, gripper closed
theta_p    : (T, p) payload parameters carried at each instant

Motion laws (rest to rest, Biagiotti and Melchiorri, *Trajectory Planning for Automatic Machines and Robots*,
Springer, 2008, Sec. 2.1.5 (polynomial of degree 5, "3-4-5"), Sec. 2.1.6 (degree 7, "4-5-6-7") and
Sec. 3.3 (cycloidal); section numbers from memory):
    3-4-5:      s = 10 tau^3 - 15 tau^4 + 6 tau^5                        (zero velocity and acceleration at the ends)
    4-5-6-7:    s = 35 tau^4 - 84 tau^5 + 70 tau^6 - 20 tau^7            (also zero jerk at the ends)
    cycloidal:  s = tau - sin(2 pi tau) / (2 pi)                          (zero velocity and acceleration at the ends)
A path of straight rest-to-rest segments with any of these laws has continuous velocity and acceleration.

Delta test cycle: 25 mm up, 305 mm across, 25 mm down, and back (the usual rating cycle of delta pickers;
common practice, no standard). Pick and place points vary from cycle to cycle; every across move is exactly
305 mm long. The gripper closes halfway through the dwell at the pick point and opens halfway through the
dwell at the place point; the work-piece mass is drawn per cycle from a normal distribution (clipped at 0).

Hexapod: point-to-point moves (3-4-5 law on position and angles) with dwells where parts are loaded or
unloaded, and a low-amplitude multi-sine about a pose, ``x_j(t) = x0_j + sum_i a_ij sin(2 pi f_ij t + phi_ij)``.
"""

from __future__ import annotations

import enum
from dataclasses import dataclass, field

import numpy as np
from numpy.typing import NDArray

from shadow.errors import ConfigurationError, ShapeError
from shadow.robots.rotations import (
    angular_acceleration_from_xyz_rates,
    angular_velocity_from_xyz_rates,
    rotation_from_xyz_angles,
)

Array = NDArray[np.float64]

DELTA_LIFT_M = 0.025  # 25 mm up and down (common practice, no standard)
DELTA_ACROSS_M = 0.305  # 305 mm across (common practice, no standard)


class MotionLaw(enum.Enum):
    """Rest-to-rest normalised motion law."""

    POLY345 = "3-4-5"
    POLY4567 = "4-5-6-7"
    CYCLOIDAL = "cycloidal"


def motion_law(law: MotionLaw, tau: Array) -> tuple[Array, Array, Array]:
    """(s, ds/dtau, d2s/dtau2) for tau clipped to [0, 1] (Biagiotti-Melchiorri 2008)."""
    t = np.clip(np.asarray(tau, dtype=float), 0.0, 1.0)
    if law is MotionLaw.POLY345:
        s = t**3 * (10.0 - 15.0 * t + 6.0 * t**2)
        s1 = 30.0 * t**2 * (1.0 - t) ** 2  # 30 t^2 - 60 t^3 + 30 t^4
        s2 = 60.0 * t * (1.0 - t) * (1.0 - 2.0 * t)  # 60 t - 180 t^2 + 120 t^3
    elif law is MotionLaw.POLY4567:
        s = t**4 * (35.0 - 84.0 * t + 70.0 * t**2 - 20.0 * t**3)
        s1 = 140.0 * t**3 * (1.0 - t) ** 3  # 140 t^3 - 420 t^4 + 420 t^5 - 140 t^6
        s2 = 420.0 * t**2 * (1.0 - t) ** 2 * (1.0 - 2.0 * t)
    else:
        s = t - np.sin(2.0 * np.pi * t) / (2.0 * np.pi)
        s1 = 1.0 - np.cos(2.0 * np.pi * t)
        s2 = 2.0 * np.pi * np.sin(2.0 * np.pi * t)
    return s, s1, s2


@dataclass(frozen=True, slots=True)
class PathSample:
    """A path sampled at times t (T,)."""

    t_s: Array  # (T,)
    x: Array  # (T, d)
    xd: Array  # (T, d)
    xdd: Array  # (T, d)
    tool: NDArray[np.bool_]  # (T,)
    theta_p: Array  # (T, p)


@dataclass(frozen=True, slots=True)
class SegmentPath:
    """Straight rest-to-rest segments back to back; a segment with zero displacement is a dwell.

    ``tool`` and ``theta_p`` hold over each segment.
    """

    start_s: Array  # (S,) segment start times, increasing
    duration_s: Array  # (S,) > 0
    origin: Array  # (S, d) segment start point
    displacement: Array  # (S, d) end minus start
    tool: NDArray[np.bool_]  # (S,)
    theta_p: Array  # (S, p)
    law: MotionLaw = MotionLaw.POLY4567

    @property
    def end_s(self) -> float:
        """Time at the end of the last segment [s]."""
        return float(self.start_s[-1] + self.duration_s[-1])

    def sample(self, t_s: Array) -> PathSample:
        """Evaluate at times t (T,): x = x0 + s d, xd = s'/D d, xdd = s''/D^2 d (chain rule)."""
        t = np.asarray(t_s, dtype=float)
        seg = np.clip(np.searchsorted(self.start_s, t, side="right") - 1, 0, len(self.start_s) - 1)
        dur = self.duration_s[seg]
        s, s1, s2 = motion_law(self.law, (t - self.start_s[seg]) / dur)
        d = self.displacement[seg]
        x = self.origin[seg] + s[:, None] * d
        xd = (s1 / dur)[:, None] * d
        xdd = (s2 / dur**2)[:, None] * d
        return PathSample(t_s=t, x=x, xd=xd, xdd=xdd, tool=self.tool[seg], theta_p=self.theta_p[seg])


def _path_from_waypoints(
    points: list[Array], durations: list[float], tools: list[bool], payloads: list[Array], law: MotionLaw
) -> SegmentPath:
    pts = np.asarray(points, dtype=float)
    dur = np.asarray(durations, dtype=float)
    if np.any(dur <= 0.0):
        raise ConfigurationError("segment durations: must be positive")
    start = np.concatenate([[0.0], np.cumsum(dur)[:-1]])
    return SegmentPath(
        start_s=start,
        duration_s=dur,
        origin=pts[:-1],
        displacement=pts[1:] - pts[:-1],
        tool=np.asarray(tools, dtype=bool),
        theta_p=np.asarray(payloads, dtype=float),
        law=law,
    )


@dataclass(frozen=True, slots=True)
class PickPlaceCycles:
    """The delta's pick-and-place path and what was drawn for it."""

    path: SegmentPath
    pick_points_m: Array  # (C, 3) pick point of each cycle
    place_points_m: Array  # (C, 3)
    workpiece_mass_kg: Array  # (C,)
    missed: NDArray[np.bool_] = field(default_factory=lambda: np.zeros(0, dtype=bool))  # (C,) closed on nothing
    doubled: NDArray[np.bool_] = field(default_factory=lambda: np.zeros(0, dtype=bool))  # (C,) two pieces lifted

    def grip_times_s(self) -> tuple[Array, Array]:
        """(close (C,), open (C,)): when the gripper of each cycle closes at the pick and opens at the place [s].

        Each cycle is 10 segments (see :func:`delta_pick_place`): it closes at the start of the second, opens at
        the start of the seventh.
        """
        starts = self.path.start_s.reshape(-1, 10)
        return starts[:, 1].copy(), starts[:, 6].copy()


def delta_pick_place(
    rng: np.random.Generator,
    n_cycles: int,
    *,
    centre_m: Array,
    spread_m: float = 0.03,
    lift_time_s: float = 0.08,
    across_time_s: float = 0.22,
    dwell_s: float = 0.06,
    tool_mass_kg: float = 0.15,
    workpiece_mass_mean_kg: float = 0.3,
    workpiece_mass_std_kg: float = 0.05,
    law: MotionLaw = MotionLaw.POLY4567,
    missed_pick_probability: float = 0.0,
    double_pick_probability: float = 0.0,
) -> PickPlaceCycles:
    """Pick-and-place cycles about ``centre_m`` (3,): up 25 mm, across 305 mm, down 25 mm, dwell, and back.

    Each cycle: dwell at the pick point (gripper closes at half dwell, the work piece is carried from then on),
    up, across to the place point, down, dwell (gripper opens at half dwell), up, across to the next pick point,
    down. Both across moves are 305 mm long; the place point of each cycle lies 305 mm from its pick point
    toward a target drawn around the mirror of the centre, the next pick point 305 mm back toward a target
    drawn around the centre (targets uniform in a disc of radius ``spread_m``), so the points wander but
    stay near their nominal places. theta_p = [tool mass + work-piece mass while gripping].

    Faults: with ``missed_pick_probability`` a cycle's gripper closes on nothing (mass 0), with
    ``double_pick_probability`` it lifts two work pieces (twice the drawn mass).
    """
    if n_cycles < 1:
        raise ConfigurationError(f"n_cycles: must be >= 1, got {n_cycles}")
    if workpiece_mass_std_kg < 0.0 or workpiece_mass_mean_kg < 0.0:
        raise ConfigurationError("workpiece mass: mean and std must be non-negative")
    centre = np.asarray(centre_m, dtype=float)
    up = np.array([0.0, 0.0, DELTA_LIFT_M])

    def target(around: Array) -> Array:
        r = spread_m * np.sqrt(rng.uniform())
        a = rng.uniform(0.0, 2.0 * np.pi)
        return around + r * np.array([np.cos(a), np.sin(a), 0.0])

    def toward(start: Array, goal: Array) -> Array:
        d = goal - start
        d[2] = 0.0
        return start + DELTA_ACROSS_M * d / np.linalg.norm(d)  # exactly 305 mm in the horizontal plane

    place_centre = centre + np.array([DELTA_ACROSS_M, 0.0, 0.0])
    pick = centre.copy()
    points: list[Array] = [pick]
    durations: list[float] = []
    tools: list[bool] = []
    payloads: list[Array] = []
    picks, places = [], []
    masses = np.clip(rng.normal(workpiece_mass_mean_kg, workpiece_mass_std_kg, size=n_cycles), 0.0, None)
    missed = np.zeros(n_cycles, dtype=bool)
    doubled = np.zeros(n_cycles, dtype=bool)
    if missed_pick_probability > 0.0 or double_pick_probability > 0.0:  # drawn only then: seeded runs stay as before
        u = rng.uniform(size=n_cycles)
        missed = u < missed_pick_probability
        doubled = (u >= missed_pick_probability) & (u < missed_pick_probability + double_pick_probability)
        masses = np.where(missed, 0.0, masses)
        masses = np.where(doubled, 2.0 * masses, masses)
    empty = np.array([tool_mass_kg])
    for c in range(n_cycles):
        place = toward(pick, target(place_centre))
        nxt = toward(place, target(centre))
        loaded = np.array([tool_mass_kg + masses[c]])
        picks.append(pick)
        places.append(place)
        # (end point, duration, tool closed, payload) of each segment
        plan = [
            (pick, 0.5 * dwell_s, False, empty),  # dwell, gripper open
            (pick, 0.5 * dwell_s, True, loaded),  # dwell, gripper closed
            (pick + up, lift_time_s, True, loaded),
            (place + up, across_time_s, True, loaded),
            (place, lift_time_s, True, loaded),
            (place, 0.5 * dwell_s, True, loaded),
            (place, 0.5 * dwell_s, False, empty),
            (place + up, lift_time_s, False, empty),
            (nxt + up, across_time_s, False, empty),
            (nxt, lift_time_s, False, empty),
        ]
        for end, dur, closed, theta in plan:
            points.append(end)
            durations.append(dur)
            tools.append(closed)
            payloads.append(theta)
        pick = nxt
    return PickPlaceCycles(
        path=_path_from_waypoints(points, durations, tools, payloads, law),
        pick_points_m=np.array(picks),
        place_points_m=np.array(places),
        workpiece_mass_kg=masses,
        missed=missed,
        doubled=doubled,
    )


# ------------------------------------------------------------------------------------------------- hexapod
def hexapod_positioning(
    rng: np.random.Generator,
    n_moves: int,
    *,
    home_m: Array,
    reach_m: float = 0.02,
    tilt_rad: float = 0.03,
    move_time_s: float = 0.6,
    dwell_s: float = 0.3,
    fixture_parameters: Array | None = None,
    part_parameters: Array | None = None,
) -> SegmentPath:
    """Point-to-point moves between random poses near ``home_m`` with the 3-4-5 law, and dwells.

    The poses are positions within ``reach_m`` per axis of the home position and XYZ angles within
    ``tilt_rad``; x is (T, 6) = [position, angles]. The platform carries ``fixture_parameters`` (10,) throughout
    (zeros without one). With ``part_parameters`` (10,), a part is clamped into the fixture during the dwell after
    every even move and taken out after every odd one: theta_p = fixture + part while the part is in (the tool
    signal is True), fixture alone otherwise.
    """
    if n_moves < 1:
        raise ConfigurationError(f"n_moves: must be >= 1, got {n_moves}")
    fixture = np.zeros(10) if fixture_parameters is None else np.asarray(fixture_parameters, dtype=float)
    part = np.zeros(10) if part_parameters is None else np.asarray(part_parameters, dtype=float)
    for name, value in (("fixture_parameters", fixture), ("part_parameters", part)):
        if value.shape != (10,):
            raise ShapeError(f"{name}: expected shape (10,), got {value.shape}")
    home = np.concatenate([np.asarray(home_m, dtype=float), np.zeros(3)])
    points: list[Array] = [home.copy()]
    durations: list[float] = []
    tools: list[bool] = []
    payloads: list[Array] = []
    carrying = False
    for _ in range(n_moves):
        goal = home + np.concatenate([rng.uniform(-reach_m, reach_m, 3), rng.uniform(-tilt_rad, tilt_rad, 3)])
        points += [goal, goal]
        durations += [move_time_s, dwell_s]
        carrying_after = (not carrying) if part_parameters is not None else False  # load, unload, ...
        tools += [carrying, carrying_after]
        payloads += [fixture + part if carrying else fixture, fixture + part if carrying_after else fixture]
        carrying = carrying_after
    return _path_from_waypoints(points, durations, tools, payloads, MotionLaw.POLY345)


@dataclass(frozen=True, slots=True)
class MultiSine:
    """x_j(t) = x0_j + sum_i a_ij sin(2 pi f_ij t + phi_ij): (d,) centre, (m, d) amplitudes, frequencies, phases."""

    centre: Array  # (d,)
    amplitude: Array  # (m, d)
    frequency_hz: Array  # (m, d)
    phase_rad: Array  # (m, d)

    def sample(self, t_s: Array, theta_p: Array) -> PathSample:
        """Analytic x, xd, xdd at t (T,) with a constant payload theta_p (p,)."""
        t = np.asarray(t_s, dtype=float)
        w = 2.0 * np.pi * self.frequency_hz  # (m, d)
        arg = w[None] * t[:, None, None] + self.phase_rad[None]  # (T, m, d)
        x = self.centre + np.sum(self.amplitude * np.sin(arg), axis=1)
        xd = np.sum(self.amplitude * w * np.cos(arg), axis=1)
        xdd = -np.sum(self.amplitude * w**2 * np.sin(arg), axis=1)
        theta = np.broadcast_to(np.asarray(theta_p, dtype=float), (t.shape[0], len(theta_p))).copy()
        return PathSample(t_s=t, x=x, xd=xd, xdd=xdd, tool=np.zeros(t.shape[0], dtype=bool), theta_p=theta)


def hexapod_multisine(
    rng: np.random.Generator,
    *,
    home_m: Array,
    amplitude_m: float = 0.004,
    amplitude_rad: float = 0.006,
    n_tones: int = 3,
    band_hz: tuple[float, float] = (0.3, 4.0),
) -> MultiSine:
    """A low-amplitude multi-sine about the home pose: ``n_tones`` tones per axis, random frequencies and phases."""
    lo, hi = band_hz
    amp = np.concatenate([np.full(3, amplitude_m), np.full(3, amplitude_rad)]) / n_tones
    return MultiSine(
        centre=np.concatenate([np.asarray(home_m, dtype=float), np.zeros(3)]),
        amplitude=np.broadcast_to(amp, (n_tones, 6)).copy(),
        frequency_hz=rng.uniform(lo, hi, size=(n_tones, 6)),
        phase_rad=rng.uniform(0.0, 2.0 * np.pi, size=(n_tones, 6)),
    )


def pose_motion(sample: PathSample) -> tuple[Array, Array, Array, Array]:
    """(p (T,3), R (T,3,3), twist (T,6), accel (T,6)) of a hexapod path x = [position, XYZ angles].

    omega and its rate from the angle rates (Craig, eq. 2.64, differentiated; see shadow.robots.rotations).
    """
    if sample.x.shape[1] != 6:
        raise ShapeError(f"x: expected shape (T, 6), got {sample.x.shape}")
    angles, rates, accels = sample.x[:, 3:], sample.xd[:, 3:], sample.xdd[:, 3:]
    rot = rotation_from_xyz_angles(angles)
    omega = angular_velocity_from_xyz_rates(angles, rates)
    alpha = angular_acceleration_from_xyz_rates(angles, rates, accels)
    twist = np.concatenate([sample.xd[:, :3], omega], axis=1)
    accel = np.concatenate([sample.xdd[:, :3], alpha], axis=1)
    return sample.x[:, :3].copy(), rot, twist, accel

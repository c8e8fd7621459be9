"""Robot description files: TOML, schema 1, SI units only; parsed, validated and mapped onto the parameter records.

Every physical key carries its unit in its name (``base_radius_m``, ``rated_torque_nm``), so a value in
another unit shows up as an unknown key: ``base_radius_mm`` is refused with "wrong unit, this schema
takes base_radius_m (metres)". Any other unknown key is refused too (typos). Each error is a
:class:`DescriptionError` naming the file and the dotted field path, e.g.
``delta.toml: inertia.upper_arm_mass_kg: must be > 0, got -1.2``. The file layout, field by field,
is in docs/robot-description.md.

Public API
----------
load_description(path) -> RobotDescription         read and validate a file
parse_description(text, source) -> RobotDescription  the same from a string
build_model(description) -> DeltaModel | HexapodModel
RobotDescription(name, family, parameters, tool, source, friction, home_position_m)

Physical checks (beyond types and signs)
----------------------------------------
- Upper arm inertia about its axis ``J_a >= m_a c_a^2`` (parallel-axis theorem: the inertia about an
  axis is at least that of the mass concentrated at its centre).
- An inertia tensor is symmetric positive semi-definite and its principal moments satisfy the
  triangle inequalities ``I_1 + I_2 >= I_3`` (any rigid body: ``I_xx + I_yy = sum m (x^2 + y^2 + 2 z^2)
  >= I_zz``; e.g. Featherstone, *Rigid Body Dynamics Algorithms*, 2008, section 2.13, from memory).
- Delta: a closed assembly must exist inside the joint limits. With all three arms at the same angle
  ``theta`` the platform sits on the axis, its point P_i lies ``h = R_b - R_p + L_a cos(theta)`` from
  the elbow horizontally, so the forearm closes iff ``L_f > |h|`` for some allowed theta (and then
  ``z = -L_a sin(theta) - sqrt(L_f^2 - h^2)`` must lie below the base).
- Hexapod: base and platform joints must not be collinear; every leg at home lies within the leg
  length limits; the inverse Jacobian at home (rows ``[u_j, P_j x u_j]``) must be well conditioned.
"""

from __future__ import annotations

import tomllib
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Literal

import numpy as np
from numpy.typing import NDArray

from shadow.errors import DescriptionError, ShadowError
from shadow.robots.delta import DeltaModel
from shadow.robots.hexapod import HexapodModel
from shadow.robots.parameters import (
    DeltaParameters,
    Drive,
    HexapodParameters,
    MeasuredQuantity,
    ReportedEffort,
    RigidPayload,
    default_gravity,
)

Array = NDArray[np.float64]
Family = Literal["delta", "hexapod"]

SCHEMA_VERSION = 1
EXAMPLES_DIR = Path(__file__).resolve().parents[1] / "examples"

# Largest accepted condition number of the hexapod's inverse Jacobian at home (mixed units m^0 / m).
MAX_HOME_CONDITION = 1e4
# Relative tolerance of the inertia-tensor checks (symmetry, semi-definiteness, triangle inequality).
INERTIA_RTOL = 1e-9
# Joint-angle samples used to look for a closed delta assembly inside the joint limits.
CLOSURE_SAMPLES = 721
# Default smoothing velocities of the friction sign function (docs/robot-description.md).
DEFAULT_SMOOTH_VELOCITY_RAD_S = 0.01
DEFAULT_SMOOTH_VELOCITY_M_S = 0.0005

# Plausible range of a declared viscous temperature coefficient [1/K]: lubricant viscosity falls with temperature
# (0 and above); 0.1 1/K would halve it every 7 K, beyond any gear oil or grease (common practice, no source).
MAX_VISCOUS_TEMPERATURE_COEFFICIENT_PER_K = 0.1
# Plausible drive temperatures [K] (the wire format's plausibility range, docs/wire-format.md).
TEMPERATURE_RANGE_K = (200.0, 450.0)

# Unit suffixes of this schema and their names (longest match wins when a key is split).
SCHEMA_UNITS = {
    "m": "metres",
    "kg": "kilograms",
    "rad": "radians",
    "kg_m2": "kilogram square metres",
    "nm": "newton metres",
    "n": "newtons",
    "nm_per_a": "newton metres per ampere",
    "hz": "hertz",
    "m_per_rev": "metres per revolution",
    "m_s2": "metres per second squared",
    "nm_s_per_rad": "newton metre seconds per radian",
    "n_s_per_m": "newton seconds per metre",
    "rad_s": "radians per second",
    "m_s": "metres per second",
    "s": "seconds",
    "k": "kelvins",
    "per_k": "per kelvin",
}
# Suffixes people write for the same quantities in other units; only used to recognise a wrong unit.
OTHER_UNITS = (
    "mm", "cm", "um", "km", "in", "inch", "inches", "ft", "g", "lb", "lbs", "t", "deg", "degrees", "mrad",
    "g_mm2", "kg_mm2", "g_cm2", "kg_cm2", "lb_in2", "kgcm2", "kgm2", "nmm", "n_mm", "mnm", "ncm", "n_m", "kn",
    "lbf", "mnm_per_a", "nmm_per_a", "n_m_per_a", "nm_a", "khz", "rpm", "mm_per_rev", "in_per_rev", "mm_rev",
    "mm_s2", "g0", "deg_s", "mm_s", "rad_per_s", "m_per_s", "nm_s_rad", "n_s_mm", "a", "ms", "us", "c", "degc",
    "per_c", "per_degc",
)  # fmt: skip
_ALL_UNITS = sorted({*SCHEMA_UNITS, *OTHER_UNITS}, key=len, reverse=True)

_DELTA_DRIVE_KEYS = (
    "rotor_inertia_kg_m2",
    "gear_ratio",
    "efficiency",
    "torque_constant_nm_per_a",
    "current_loop_bandwidth_hz",
    "rated_torque_nm",
)
_HEXAPOD_DRIVE_KEYS = (*_DELTA_DRIVE_KEYS[:-1], "rated_force_n", "screw_lead_m_per_rev")


@dataclass(frozen=True, slots=True)
class DeltaTool:
    """Nominal end-of-arm tool of a delta picker and the work piece it carries; point masses at the platform."""

    tool_mass_kg: float  # gripper or suction head, always carried
    work_piece_mass_kg: float  # one picked item, carried while gripping
    work_piece_tolerance_kg: float  # +- spread of the item's mass accepted as normal

    def payload_parameters(self, *, gripping: bool) -> Array:
        """theta_p (1,) [kg]: the tool, plus the work piece while gripping."""
        return np.array([self.tool_mass_kg + (self.work_piece_mass_kg if gripping else 0.0)])

    def work_piece_parameters_per_kg(self) -> Array:
        """w (1,): a work piece of mass m adds m w to theta_p (the model's one payload mass)."""
        return np.ones(1)


@dataclass(frozen=True, slots=True)
class HexapodFixture:
    """Nominal fixture clamped on the hexapod platform, and the part loaded into it between moves.

    The fixture is always carried; the part only while the tool state says so (a clamped part). A part of
    zero mass means the cell declares none: the whole payload is then the fixture.
    """

    payload: RigidPayload  # the fixture, always carried
    part: RigidPayload = field(default_factory=lambda: RigidPayload(mass_kg=0.0))  # loaded while gripping
    part_tolerance_kg: float = 0.0  # +- spread of the part's mass accepted as normal

    def payload_parameters(self, *, gripping: bool = False) -> Array:
        """theta_p (10,): standard inertial parameters about the platform origin, of the fixture and, while
        ``gripping``, of the part with it (the parameters of two rigid bodies add)."""
        theta = self.payload.standard_parameters()
        return theta + self.part.standard_parameters() if gripping else theta

    @property
    def work_piece_mass_kg(self) -> float:
        """Mass of the declared part [kg] (0: none declared)."""
        return float(self.part.mass_kg)

    @property
    def work_piece_tolerance_kg(self) -> float:
        """Accepted +- spread of the part's mass [kg]."""
        return float(self.part_tolerance_kg)

    def work_piece_parameters_per_kg(self) -> Array | None:
        """w (10,): the part's standard parameters per kg of its mass (its centre of mass and inertia fixed), so
        that a part of mass m adds ``m w``; None when no part is declared."""
        m = float(self.part.mass_kg)
        return None if m <= 0.0 else self.part.standard_parameters() / m


@dataclass(frozen=True, slots=True)
class NominalFriction:
    """Nominal per-actuator friction in the layout of :func:`shadow.robots.friction.friction_regressor`."""

    coulomb: Array  # (n,) F_c [N m | N]
    viscous: Array  # (n,) F_v [N m s/rad | N s/m]
    offset: Array  # (n,) o [N m | N]
    smooth_velocity: float  # v_s [rad/s | m/s]
    # (n,) declared k of ``F_v(T) = F_v(T_ref) exp(-k (T - T_ref))`` [1/K], or None (not declared)
    viscous_temperature_coefficient_per_k: Array | None = None
    viscous_reference_temperature_k: float | None = None  # T at which ``viscous`` holds [K], or None
    # v_st of the Stribeck term ``F_st s(qd) exp(-(qd / v_st)^2)`` [rad/s | m/s], or None: no Stribeck term
    stribeck_velocity: float | None = None
    stribeck: Array | None = None  # (n,) F_st = F_s - F_c, the breakaway excess [N m | N]; with stribeck_velocity

    @property
    def per_actuator(self) -> int:
        """k: 3 (Coulomb, viscous, offset), or 4 with the Stribeck term."""
        return 3 if self.stribeck_velocity is None else 4

    def parameters(self) -> Array:
        """theta_f (k n,) = ``[F_c1, F_v1, o_1(, F_st1), F_c2, ...]``."""
        columns = [self.coulomb, self.viscous, self.offset]
        if self.stribeck_velocity is not None:
            columns.append(self.stribeck if self.stribeck is not None else np.zeros_like(self.coulomb))
        return np.stack(columns, axis=1).reshape(-1)


@dataclass(frozen=True, slots=True)
class RobotDescription:
    """A validated robot description."""

    name: str
    family: Family
    parameters: DeltaParameters | HexapodParameters
    tool: DeltaTool | HexapodFixture
    source: str  # the file it came from, or "<string>"
    friction: NominalFriction | None = None
    home_position_m: Array | None = None  # (3,); hexapod: the parameters' home; delta: [home] or None

    @property
    def n_actuators(self) -> int:
        """3 (delta) or 6 (hexapod)."""
        return 3 if self.family == "delta" else 6


def load_description(
    path: str | Path, *, inertia_rtol: float = INERTIA_RTOL, max_home_condition: float = MAX_HOME_CONDITION
) -> RobotDescription:
    """Read and validate a robot description file.

    Parameters
    ----------
    path : the TOML file
    inertia_rtol : relative tolerance [-] of the inertia checks (symmetry, semi-definiteness, triangle
        inequalities, parallel-axis bound), relative to the largest entry
    max_home_condition : largest accepted condition number [-] of the hexapod's inverse Jacobian at home

    Raises
    ------
    DescriptionError
        if the file cannot be read, is not TOML, or fails validation (the message names file and field).
    """
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except OSError as exc:
        raise DescriptionError(f"{p}: cannot read the description: {exc.strerror or exc}") from exc
    except UnicodeDecodeError as exc:
        raise DescriptionError(f"{p}: not UTF-8 text: {exc}") from exc
    return parse_description(text, source=str(p), inertia_rtol=inertia_rtol, max_home_condition=max_home_condition)


def parse_description(
    text: str,
    source: str = "<string>",
    *,
    inertia_rtol: float = INERTIA_RTOL,
    max_home_condition: float = MAX_HOME_CONDITION,
) -> RobotDescription:
    """Parse and validate the text of a robot description (see :func:`load_description`)."""
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise DescriptionError(f"{source}: not valid TOML: {exc}") from exc
    top = _Table(doc, "", source, inertia_rtol)
    schema = top.value("schema", lambda v: isinstance(v, int) and not isinstance(v, bool), "an integer")
    if schema != SCHEMA_VERSION:
        top.fail("schema", f"unsupported version {schema}; this loader reads schema = {SCHEMA_VERSION}")
    name = top.string("name")
    family = top.choice("family", ("delta", "hexapod"))
    gravity = top.vector("gravity_m_s2", 3, default=default_gravity())
    if family == "delta":
        description = _parse_delta(top, name, gravity, source)
    else:
        description = _parse_hexapod(top, name, gravity, source, max_home_condition)
    top.finish()
    return description


def build_model(description: RobotDescription) -> DeltaModel | HexapodModel:
    """The rigid-body model of a described robot."""
    if isinstance(description.parameters, DeltaParameters):
        return DeltaModel(description.parameters)
    return HexapodModel(description.parameters)


def example_paths() -> list[Path]:
    """The example descriptions shipped with shadow (shadow/examples/*.toml), sorted by name."""
    return sorted(EXAMPLES_DIR.glob("*.toml"))


# ---------------------------------------------------------------------------------------------- families


def _parse_delta(top: _Table, name: str, gravity: Array, source: str) -> RobotDescription:
    geo = top.table("geometry")
    r_b = geo.number("base_radius_m", positive=True)
    r_p = geo.number("platform_radius_m", positive=True)
    l_a = geo.number("upper_arm_length_m", positive=True)
    l_f = geo.number("forearm_length_m", positive=True)
    phi0 = geo.number("first_leg_azimuth_rad", default=0.0)
    geo.finish()

    ine = top.table("inertia")
    m_a = ine.number("upper_arm_mass_kg", positive=True)
    c_a = ine.number("upper_arm_com_m", non_negative=True)
    if c_a > l_a:
        ine.fail("upper_arm_com_m", f"must lie on the arm, in [0, upper_arm_length_m = {l_a:g}] m, got {c_a:g}")
    j_a = ine.number("upper_arm_inertia_kg_m2", positive=True)
    if j_a < m_a * c_a**2 * (1.0 - top.inertia_rtol):
        ine.fail(
            "upper_arm_inertia_kg_m2",
            f"must be >= upper_arm_mass_kg * upper_arm_com_m^2 = {m_a * c_a**2:.6g} (parallel-axis theorem), "
            f"got {j_a:g}",
        )
    m_f = ine.number("forearm_mass_kg", positive=True)
    m_p = ine.number("platform_mass_kg", positive=True)
    ine.finish()

    drives = _parse_drives(top, 3, _DELTA_DRIVE_KEYS)

    lim = top.table("limits")
    lo = lim.per_actuator("joint_lower_rad", 3)
    hi = lim.per_actuator("joint_upper_rad", 3)
    for i in range(3):
        if not lo[i] < hi[i]:
            lim.fail("joint_upper_rad", f"actuator {i + 1}: upper limit {hi[i]:g} rad must exceed lower {lo[i]:g} rad")
        if lo[i] < -np.pi or hi[i] > np.pi:
            lim.fail(
                "joint_lower_rad", f"actuator {i + 1}: limits must lie in [-pi, pi] rad, got [{lo[i]:g}, {hi[i]:g}]"
            )
    lim.finish()

    tool_t = top.table("tool")
    tool = DeltaTool(
        tool_mass_kg=tool_t.number("tool_mass_kg", non_negative=True),
        work_piece_mass_kg=tool_t.number("work_piece_mass_kg", non_negative=True, default=0.0),
        work_piece_tolerance_kg=tool_t.number("work_piece_tolerance_kg", non_negative=True, default=0.0),
    )
    tool_t.finish()

    home = None
    if top.has("home"):
        home_t = top.table("home")
        home = home_t.vector("position_m", 3)
        home_t.finish()

    _check_delta_closure(top, r_b, r_p, l_a, l_f, lo, hi)
    params = DeltaParameters(
        base_radius_m=r_b,
        platform_radius_m=r_p,
        upper_arm_length_m=l_a,
        forearm_length_m=l_f,
        first_leg_azimuth_rad=phi0,
        upper_arm_mass_kg=m_a,
        upper_arm_com_m=c_a,
        upper_arm_inertia_kg_m2=j_a,
        forearm_mass_kg=m_f,
        platform_mass_kg=m_p,
        drives=(drives[0], drives[1], drives[2]),
        joint_lower_rad=lo,
        joint_upper_rad=hi,
        gravity_m_s2=gravity,
    )
    if home is not None:
        _check_delta_home(top, params, home)
    friction = _parse_friction(top, 3, "nm", "nm_s_per_rad", "rad_s", DEFAULT_SMOOTH_VELOCITY_RAD_S)
    return RobotDescription(name, "delta", params, tool, source, friction, home)


def _check_delta_closure(top: _Table, r_b: float, r_p: float, l_a: float, l_f: float, lo: Array, hi: Array) -> None:
    """A symmetric closed assembly below the base must exist for some common joint angle within the limits."""
    t_lo, t_hi = float(np.max(lo)), float(np.min(hi))
    if t_lo > t_hi:
        top.fail("limits", f"the joint ranges share no common angle (max lower {t_lo:g} > min upper {t_hi:g} rad)")
    theta = np.linspace(t_lo, t_hi, CLOSURE_SAMPLES)
    h = r_b - r_p + l_a * np.cos(theta)  # horizontal distance elbow -> platform point, platform on the axis
    z = -l_a * np.sin(theta) - np.sqrt(np.maximum(l_f**2 - h**2, 0.0))  # lower closure height
    closes = (np.abs(h) < l_f) & (z < 0.0)
    if not closes.any():
        need = float(np.min(np.abs(h)))
        top.fail(
            "geometry.forearm_length_m",
            f"no closed assembly within the joint limits: the forearm ({l_f:g} m) must be longer than "
            f"{need:.6g} m (|base_radius_m - platform_radius_m + upper_arm_length_m cos(theta)|) "
            "and reach below the base",
        )


def _check_delta_home(top: _Table, params: DeltaParameters, home: Array) -> None:
    model = DeltaModel(params)
    try:
        q = model.inverse_kinematics(home[None, :])
        model.check_reachable(q)
    except ShadowError as exc:  # any kinematic failure means the home pose is unusable
        top.fail("home.position_m", f"not reachable: {exc}")


def _parse_hexapod(top: _Table, name: str, gravity: Array, source: str, max_home_condition: float) -> RobotDescription:
    geo = top.table("geometry")
    if geo.has("base_joints_m") or geo.has("platform_joints_m"):
        base = geo.matrix("base_joints_m", (6, 3))
        plat = geo.matrix("platform_joints_m", (6, 3))
        for key in ("base_radius_m", "platform_radius_m", "base_pair_separation_rad", "platform_pair_separation_rad"):
            if geo.has(key):
                geo.fail(key, "give either the joint lists (base_joints_m, platform_joints_m) or the radii, not both")
    else:
        base, plat = _paired_joints(geo)
    geo.finish()
    for key, joints in (("base_joints_m", base), ("platform_joints_m", plat)):
        sv = np.linalg.svd(joints - joints.mean(axis=0), compute_uv=False)
        if sv[1] <= 1e-6 * max(sv[0], 1e-300):
            geo.fail(key, "the six joints are collinear (or coincide); they must span a plane")

    ine = top.table("inertia")
    m1 = ine.number("lower_leg_mass_kg", positive=True)
    e1 = ine.number("lower_leg_com_m", non_negative=True)
    i1 = ine.number("lower_leg_inertia_kg_m2", non_negative=True)
    m2 = ine.number("upper_leg_mass_kg", positive=True)
    e2 = ine.number("upper_leg_com_m", non_negative=True)
    i2 = ine.number("upper_leg_inertia_kg_m2", non_negative=True)
    m_p = ine.number("platform_mass_kg", positive=True)
    c_p = ine.vector("platform_com_m", 3)
    i_p = ine.inertia_tensor("platform_inertia_kg_m2")
    ine.finish()

    drives = _parse_drives(top, 6, _HEXAPOD_DRIVE_KEYS)

    lim = top.table("limits")
    q_lo = lim.number("leg_lower_m", positive=True)
    q_hi = lim.number("leg_upper_m", positive=True)
    if not q_lo < q_hi:
        lim.fail("leg_upper_m", f"must exceed leg_lower_m = {q_lo:g} m, got {q_hi:g}")
    lim.finish()

    tool_t = top.table("tool")
    payload = RigidPayload(
        mass_kg=tool_t.number("fixture_mass_kg", non_negative=True),
        com_m=tool_t.vector("fixture_com_m", 3, default=np.zeros(3)),
        inertia_kg_m2=tool_t.inertia_tensor("fixture_inertia_kg_m2", default=np.zeros((3, 3))),
    )
    part = RigidPayload(
        mass_kg=tool_t.number("part_mass_kg", non_negative=True, default=0.0),
        com_m=tool_t.vector("part_com_m", 3, default=np.zeros(3)),
        inertia_kg_m2=tool_t.inertia_tensor("part_inertia_kg_m2", default=np.zeros((3, 3))),
    )
    part_tolerance = tool_t.number("part_tolerance_kg", non_negative=True, default=0.0)
    tool_t.finish()

    home_t = top.table("home")
    home = home_t.vector("position_m", 3)
    home_t.finish()
    legs = home[None, :] + plat - base  # l_j at home, R = identity
    q_home = np.linalg.norm(legs, axis=1)
    for j in range(6):
        if not q_lo <= q_home[j] <= q_hi:
            home_t.fail(
                "position_m",
                f"leg {j + 1} is {q_home[j]:.6g} m long at home, outside the limits [{q_lo:g}, {q_hi:g}] m",
            )
    u = legs / q_home[:, None]
    j_inv = np.concatenate([u, np.cross(plat, u)], axis=1)  # rows [u_j, P_j x u_j] at R = identity
    cond = float(np.linalg.cond(j_inv))
    if not cond <= max_home_condition:
        top.fail(
            "geometry",
            f"the legs are (nearly) singular at home: inverse Jacobian condition number {cond:.3g} "
            f"> {max_home_condition:g}; the platform would not be held",
        )

    params = HexapodParameters(
        base_joints_m=base,
        platform_joints_m=plat,
        lower_leg_mass_kg=m1,
        lower_leg_com_m=e1,
        lower_leg_inertia_kg_m2=i1,
        upper_leg_mass_kg=m2,
        upper_leg_com_m=e2,
        upper_leg_inertia_kg_m2=i2,
        platform_mass_kg=m_p,
        platform_com_m=c_p,
        platform_inertia_kg_m2=i_p,
        drives=(drives[0], drives[1], drives[2], drives[3], drives[4], drives[5]),
        leg_lower_m=q_lo,
        leg_upper_m=q_hi,
        home_position_m=home,
        gravity_m_s2=gravity,
    )
    friction = _parse_friction(top, 6, "n", "n_s_per_m", "m_s", DEFAULT_SMOOTH_VELOCITY_M_S)
    return RobotDescription(
        name, "hexapod", params, HexapodFixture(payload, part, part_tolerance), source, friction, home.copy()
    )


def _paired_joints(geo: _Table) -> tuple[Array, Array]:
    """Joints in three pairs: base pairs centred at ``phi_0 + 120 k`` deg, platform pairs 60 deg further.

    Leg ``2k`` joins the base joint at ``c_k - s_b / 2`` to the platform joint at ``c_k - 60 deg + s_p / 2``,
    leg ``2k + 1`` the base joint at ``c_k + s_b / 2`` to the platform joint at ``c_k + 60 deg - s_p / 2``.
    """
    r_b = geo.number("base_radius_m", positive=True)
    r_p = geo.number("platform_radius_m", positive=True)
    s_b = geo.number("base_pair_separation_rad", non_negative=True)
    s_p = geo.number("platform_pair_separation_rad", non_negative=True)
    phi0 = geo.number("first_pair_azimuth_rad", default=0.0)
    for key, s in (("base_pair_separation_rad", s_b), ("platform_pair_separation_rad", s_p)):
        if s >= 2.0 * np.pi / 3.0:
            geo.fail(key, f"must be < 2 pi / 3 rad (the pairs would overlap), got {s:g}")
    centre = phi0 + 2.0 * np.pi / 3.0 * np.repeat(np.arange(3), 2)  # c_k for legs 2k and 2k+1
    side = np.tile([-1.0, 1.0], 3)
    beta = centre + side * s_b / 2.0  # base joint azimuths
    gamma = centre + side * (np.pi / 3.0 - s_p / 2.0)  # platform joint azimuths
    base = np.stack([r_b * np.cos(beta), r_b * np.sin(beta), np.zeros(6)], axis=1)
    plat = np.stack([r_p * np.cos(gamma), r_p * np.sin(gamma), np.zeros(6)], axis=1)
    return base, plat


def _parse_drives(top: _Table, n: int, keys: tuple[str, ...]) -> list[Drive]:
    """[drives] shared by all actuators with optional [[drives.overrides]], or [[drives]] with one table each."""
    raw = top.raw("drives")
    if isinstance(raw, list):
        if len(raw) != n:
            top.fail("drives", f"expected {n} [[drives]] tables (one per actuator), got {len(raw)}")
        tables = [top.table_from(raw[i], f"drives[{i + 1}]") for i in range(n)]
        values = [{k: _drive_value(t, k) for k in keys} for t in tables]
        for t in tables:
            t.finish()
    else:
        shared = top.table("drives")
        common = {k: _drive_value(shared, k) for k in keys}
        values = [dict(common) for _ in range(n)]
        overrides = shared.raw("overrides", default=[])
        if not isinstance(overrides, list):
            shared.fail("overrides", "must be an array of tables ([[drives.overrides]])")
        for k, entry in enumerate(overrides):
            t = shared.table_from(entry, f"overrides[{k + 1}]")
            actuator = t.value("actuator", lambda v: isinstance(v, int) and not isinstance(v, bool), "an integer")
            if not 1 <= actuator <= n:
                t.fail("actuator", f"must be 1 .. {n}, got {actuator}")
            for key in keys:
                if t.has(key):
                    values[actuator - 1][key] = _drive_value(t, key)
            t.finish()
        shared.finish()

    meas = top.table("measurement")
    quantities = meas.per_actuator_choice("quantity", n, tuple(q.value for q in MeasuredQuantity))
    reported = meas.per_actuator_choice(
        "reported_effort", n, tuple(r.value for r in ReportedEffort), default=ReportedEffort.ACTUAL.value
    )
    periods: list[float | None] = [None] * n
    if meas.has("command_period_s"):
        periods = [float(p) for p in meas.per_actuator("command_period_s", n, non_negative=True)]
    meas.finish()

    drives = []
    for i, v in enumerate(values):
        rated = v.get("rated_torque_nm", v.get("rated_force_n"))
        drives.append(
            Drive(
                rotor_inertia_kg_m2=v["rotor_inertia_kg_m2"],
                gear_ratio=v["gear_ratio"],
                efficiency=v["efficiency"],
                torque_constant_nm_per_a=v["torque_constant_nm_per_a"],
                current_loop_bandwidth_hz=v["current_loop_bandwidth_hz"],
                rated_effort=float(rated),
                measured=MeasuredQuantity(quantities[i]),
                screw_lead_m=v.get("screw_lead_m_per_rev"),
                reported=ReportedEffort(reported[i]),
                command_period_s=periods[i],
            )
        )
    return drives


def _drive_value(t: _Table, key: str) -> float:
    """One drive number, > 0; the efficiency also <= 1."""
    if key != "efficiency":
        return t.number(key, positive=True)
    v = t.number(key)
    if not 0.0 < v <= 1.0:
        t.fail(key, f"must be in (0, 1], got {v:g}")
    return v


def _parse_friction(
    top: _Table, n: int, effort_unit: str, viscous_unit: str, velocity_unit: str, default_v_s: float
) -> NominalFriction | None:
    if not top.has("friction"):
        return None
    t = top.table("friction")
    k_key, t_key = "viscous_temperature_coefficient_per_k", "viscous_reference_temperature_k"
    k_v = None
    if t.has(k_key):
        k_v = t.per_actuator(k_key, n)
        for i, k in enumerate(k_v):
            label = k_key if _is_number(t.raw(k_key)) else f"{k_key}[{i + 1}]"
            if not 0.0 <= k <= MAX_VISCOUS_TEMPERATURE_COEFFICIENT_PER_K:
                t.fail(
                    label,
                    f"must lie in [0, {MAX_VISCOUS_TEMPERATURE_COEFFICIENT_PER_K:g}] 1/K (viscosity falls with "
                    f"temperature, gear oils about 0.02-0.03 1/K), got {k:g}",
                )
    t_ref = None
    if t.has(t_key):
        t_ref = t.number(t_key)
        lo, hi = TEMPERATURE_RANGE_K
        if not lo <= t_ref <= hi:
            hint = " (it looks like degrees Celsius; this schema takes kelvins)" if -60.0 <= t_ref < lo else ""
            t.fail(t_key, f"must lie in [{lo:g}, {hi:g}] K, got {t_ref:g}{hint}")
    v_key, st_key = f"stribeck_velocity_{velocity_unit}", f"stribeck_{effort_unit}"
    v_st = t.number(v_key, positive=True) if t.has(v_key) else None
    if t.has(st_key) and v_st is None:
        t.fail(st_key, f"a Stribeck level needs its velocity: declare {v_key} as well")
    f_st = None if v_st is None else t.per_actuator(st_key, n, non_negative=True, default=0.0)
    friction = NominalFriction(
        coulomb=t.per_actuator(f"coulomb_{effort_unit}", n, non_negative=True),
        viscous=t.per_actuator(f"viscous_{viscous_unit}", n, non_negative=True),
        offset=t.per_actuator(f"offset_{effort_unit}", n, default=0.0),
        smooth_velocity=t.number(f"smooth_velocity_{velocity_unit}", positive=True, default=default_v_s),
        viscous_temperature_coefficient_per_k=k_v,
        viscous_reference_temperature_k=t_ref,
        stribeck_velocity=v_st,
        stribeck=f_st,
    )
    t.finish()
    return friction


# ---------------------------------------------------------------------------------------------- table reader

_MISSING: Any = object()


def _unit_of(key: str) -> str | None:
    """The schema unit suffix a known key ends with (longest match), or None for dimensionless keys."""
    for unit in sorted(SCHEMA_UNITS, key=len, reverse=True):
        if key.endswith("_" + unit):
            return unit
    return None


def _stems(key: str) -> set[str]:
    """The key without each unit suffix it may end with (``base_radius_mm`` -> {"base_radius"})."""
    return {key[: -len(u) - 1] for u in _ALL_UNITS if key.endswith("_" + u) and len(key) > len(u) + 1}


def _is_number(v: object) -> bool:
    return isinstance(v, int | float) and not isinstance(v, bool)


class _Table:
    """One TOML table being read: remembers the keys asked for, so unknown keys can be reported at the end."""

    def __init__(self, data: dict[str, Any], path: str, source: str, inertia_rtol: float) -> None:
        self.data = data
        self.path = path
        self.source = source
        self.inertia_rtol = inertia_rtol
        self.known: set[str] = set()

    def where(self, key: str) -> str:
        return f"{self.path}.{key}" if self.path else key

    def fail(self, key: str, reason: str) -> Any:
        raise DescriptionError(f"{self.source}: {self.where(key)}: {reason}")

    def has(self, key: str) -> bool:
        self.known.add(key)
        return key in self.data

    def raw(self, key: str, default: Any = _MISSING) -> Any:
        self.known.add(key)
        if key in self.data:
            return self.data[key]
        if default is not _MISSING:
            return default
        self._wrong_unit_or_missing(key)

    def _wrong_unit_or_missing(self, key: str) -> None:
        stems = _stems(key)
        for other in self.data:
            if other != key and stems & _stems(other):
                self._wrong_unit(other, key)
        self.fail(key, "missing field")

    def _wrong_unit(self, given: str, wanted: str) -> None:
        unit = _unit_of(wanted)
        named = f" ({SCHEMA_UNITS[unit]})" if unit else ""
        self.fail(given, f"wrong unit, this schema takes {wanted}{named}")

    def value(self, key: str, ok: Callable[[Any], bool], what: str, default: Any = _MISSING) -> Any:
        v = self.raw(key, default)
        if v is default and default is not _MISSING:
            return v
        if not ok(v):
            self.fail(key, f"must be {what}, got {type(v).__name__} {v!r}")
        return v

    def string(self, key: str) -> str:
        v = self.value(key, lambda x: isinstance(x, str), "a string")
        if not v.strip():
            self.fail(key, "must not be empty")
        return str(v)

    def choice(self, key: str, choices: tuple[str, ...]) -> str:
        v = self.string(key)
        if v not in choices:
            self.fail(key, f"must be one of {', '.join(repr(c) for c in choices)}, got {v!r}")
        return v

    def number(
        self, key: str, *, positive: bool = False, non_negative: bool = False, default: float | None = None
    ) -> float:
        v = self.value(key, _is_number, "a number", _MISSING if default is None else default)
        return self._checked_number(key, float(v), positive, non_negative)

    def _checked_number(self, key: str, v: float, positive: bool, non_negative: bool) -> float:
        if not np.isfinite(v):
            self.fail(key, f"must be finite, got {v}")
        if positive and not v > 0.0:
            self.fail(key, f"must be > 0, got {v:g}")
        if non_negative and not v >= 0.0:
            self.fail(key, f"must be >= 0, got {v:g}")
        return v

    def vector(self, key: str, length: int, default: Array | None = None) -> Array:
        v = self.raw(key, _MISSING if default is None else default)
        if isinstance(v, np.ndarray):
            return v.copy()
        if not isinstance(v, list) or len(v) != length or not all(_is_number(x) for x in v):
            self.fail(key, f"must be a list of {length} numbers, got {v!r}")
        a = np.array(v, dtype=float)
        if not np.all(np.isfinite(a)):
            self.fail(key, f"must be finite, got {v!r}")
        return a

    def matrix(self, key: str, shape: tuple[int, int], default: Array | None = None) -> Array:
        v = self.raw(key, _MISSING if default is None else default)
        if isinstance(v, np.ndarray):
            return v.copy()
        rows, cols = shape
        good = isinstance(v, list) and len(v) == rows
        good = good and all(isinstance(r, list) and len(r) == cols and all(_is_number(x) for x in r) for r in v)
        if not good:
            self.fail(key, f"must be {rows} lists of {cols} numbers each, got {v!r}")
        a = np.array(v, dtype=float)
        if not np.all(np.isfinite(a)):
            self.fail(key, "must be finite")
        return a

    def inertia_tensor(self, key: str, default: Array | None = None) -> Array:
        """A 3 x 3 inertia tensor [kg m^2]: symmetric, positive semi-definite, principal moments obey the
        triangle inequalities."""
        i_c = self.matrix(key, (3, 3), default)
        scale = max(float(np.max(np.abs(i_c))), 1e-300)
        tol = self.inertia_rtol * scale
        asym = np.abs(i_c - i_c.T)
        if asym.max() > tol:
            r, c = (int(k) for k in np.unravel_index(np.argmax(asym), asym.shape))
            self.fail(key, f"not symmetric: [{r}][{c}] = {i_c[r, c]:g} but [{c}][{r}] = {i_c[c, r]:g}")
        moments = np.linalg.eigvalsh((i_c + i_c.T) / 2.0)  # principal moments, ascending
        if moments[0] < -tol:
            self.fail(key, f"not positive semi-definite: principal moments {np.round(moments, 12).tolist()}")
        if moments[0] + moments[1] < moments[2] - tol:
            self.fail(
                key,
                f"principal moments {np.round(moments, 12).tolist()} violate the triangle inequality "
                "I1 + I2 >= I3 (no rigid body has them)",
            )
        return i_c

    def per_actuator(
        self,
        key: str,
        n: int,
        *,
        non_negative: bool = False,
        positive: bool = False,
        default: float | None = None,
    ) -> Array:
        """A number for all actuators or a list of n numbers."""
        v = self.raw(key, _MISSING if default is None else default)
        if _is_number(v):
            return np.full(n, self._checked_number(key, float(v), positive, non_negative))
        if not isinstance(v, list) or len(v) != n or not all(_is_number(x) for x in v):
            self.fail(key, f"must be a number or a list of {n} numbers (one per actuator), got {v!r}")
        for i, x in enumerate(v):
            self._checked_number(f"{key}[{i + 1}]", float(x), positive, non_negative)
        return np.array(v, dtype=float)

    def per_actuator_choice(self, key: str, n: int, choices: tuple[str, ...], default: str | None = None) -> list[str]:
        """A string for all actuators or a list of n strings, each one of ``choices``."""
        v = self.raw(key, _MISSING if default is None else default)
        values = [v] * n if isinstance(v, str) else v
        if not isinstance(values, list) or len(values) != n or not all(isinstance(x, str) for x in values):
            self.fail(key, f"must be a string or a list of {n} strings, got {v!r}")
        for i, x in enumerate(values):
            if x not in choices:
                label = key if isinstance(v, str) else f"{key}[{i + 1}]"
                self.fail(label, f"must be one of {', '.join(repr(c) for c in choices)}, got {x!r}")
        return list(values)

    def table(self, key: str) -> _Table:
        return self.table_from(self.raw(key), key)

    def table_from(self, v: Any, key: str) -> _Table:
        if not isinstance(v, dict):
            self.fail(key, f"must be a table ([{self.where(key)}]), got {type(v).__name__}")
        return _Table(v, self.where(key), self.source, self.inertia_rtol)

    def finish(self) -> None:
        """Refuse keys nobody asked for: a wrong unit if the stem matches a known key, else unknown."""
        for key in self.data:
            if key in self.known:
                continue
            stems = _stems(key)
            for known in sorted(self.known):
                if stems & _stems(known):
                    self._wrong_unit(key, known)
            section = f"[{self.path}]" if self.path else "the top level"
            self.fail(key, f"unknown key in {section}; known keys: {', '.join(sorted(self.known))}")

"""``shadow robot``: check a robot description file, or compute the model's efforts along a recorded motion.

``shadow robot check FILE`` validates the description and prints a summary: family, reach (workspace
extents found on a grid), home pose, static efforts at home with the nominal tool against the rated
ones, and the worst Jacobian condition number over the grid with where it occurs.

``shadow robot efforts FILE MOTION.csv [-o OUT.csv] [--friction] [--work-piece]`` reads a motion (CSV
with a header; the layouts are in docs/robot-commands.md), differentiates it on its own time column
and writes the rigid-body model's actuator efforts as CSV.

Derivatives: velocity by the second-order central difference on the actual (possibly uneven) time
steps (``numpy.gradient`` with the sample times, second-order one-sided at the two ends);
acceleration by the three-point second difference on uneven steps,
``f''_k = 2 (h_- f_{k+1} - (h_- + h_+) f_k + h_+ f_{k-1}) / (h_- h_+ (h_- + h_+))`` with
``h_- = t_k - t_{k-1}``, ``h_+ = t_{k+1} - t_k``; the first and last samples take their neighbour's value.
"""

from __future__ import annotations

import argparse
import csv
import itertools
import sys
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any, TextIO

import numpy as np
from numpy.typing import NDArray

from shadow.errors import DescriptionError, ShadowError, UnreachablePoseError
from shadow.robots.delta import DeltaModel
from shadow.robots.description import RobotDescription, build_model, load_description
from shadow.robots.drives import current_from_effort
from shadow.robots.friction import friction_effort
from shadow.robots.hexapod import HexapodModel
from shadow.robots.rotations import (
    angular_acceleration_from_xyz_rates,
    angular_velocity_from_xyz_rates,
    rotation_from_xyz_angles,
)

Array = NDArray[np.float64]

DEFAULT_GRID_POINTS = 15  # per axis for the reach and conditioning search (15^3 = 3375 poses)
HEXAPOD_SEARCH_HALF_SPAN_M = 0.4  # translation search around home, +- on each axis
HEXAPOD_TILT_SEARCH_RAD = 1.0  # largest roll / pitch / yaw tried at home
MIN_SAMPLES = 3  # central differences need a neighbour on each side


class MotionFileError(ShadowError, ValueError):
    """A motion CSV file is missing, has a bad header, or a bad value (message names line and column)."""


def register(commands: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    parser = commands.add_parser(
        "robot",
        help="check a description, or compute efforts along a motion",
        description=__doc__,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    actions = parser.add_subparsers(dest="robot_action", metavar="ACTION", title="actions")
    actions.required = True

    check = actions.add_parser(
        "check",
        help="validate a description and print reach, home efforts and worst conditioning",
        description="Validate a robot description file and print a summary of what the model can do.",
    )
    check.add_argument("file", type=Path, metavar="FILE", help="robot description (TOML, schema 1)")
    check.add_argument(
        "--grid",
        type=_grid_points,
        default=DEFAULT_GRID_POINTS,
        metavar="K",
        help=f"grid points per axis of the workspace search (default {DEFAULT_GRID_POINTS}; the hexapod uses 2K+1)",
    )
    check.set_defaults(handler=run_check)

    efforts = actions.add_parser(
        "efforts",
        help="actuator efforts of the rigid-body model along a motion CSV",
        description=(
            "Compute the rigid-body model's actuator efforts along a recorded motion. MOTION.csv has a header: "
            "time_s,x_m,y_m,z_m (delta platform), time_s,x_m,y_m,z_m,roll_rad,pitch_rad,yaw_rad (hexapod "
            "platform), or time_s,q1_rad,q2_rad,q3_rad / time_s,q1_m,...,q6_m (actuator positions). "
            "Output: time_s,effort1_nm,... (delta) or time_s,effort1_n,... (hexapod)."
        ),
    )
    efforts.add_argument("file", type=Path, metavar="FILE", help="robot description (TOML, schema 1)")
    efforts.add_argument("motion", type=Path, metavar="MOTION.csv", help="motion with a header row")
    efforts.add_argument("-o", "--output", type=Path, metavar="OUT.csv", help="write here instead of stdout")
    efforts.add_argument(
        "--friction", action="store_true", help="add the nominal friction declared in the description's [friction]"
    )
    efforts.add_argument(
        "--work-piece", action="store_true", help="delta: carry the nominal work piece as well as the tool"
    )
    efforts.set_defaults(handler=run_efforts)


# ---------------------------------------------------------------------------------------------- check


def _grid_points(text: str) -> int:
    try:
        k = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"not an integer: {text!r}") from None
    if k < 2:
        raise argparse.ArgumentTypeError(f"must be at least 2, got {k}")
    return k


def run_check(args: argparse.Namespace) -> int:
    description = load_description(args.file)
    model = build_model(description)
    lines = [f"{description.name}: {description.family}, {description.n_actuators} actuators ({description.source})"]
    if isinstance(model, DeltaModel):
        lines += _check_delta(description, model, args.grid)
    else:
        lines += _check_hexapod(description, model, args.grid)
    print("\n".join(lines))
    return 0


def _check_delta(description: RobotDescription, model: DeltaModel, grid: int) -> list[str]:
    p = model.params
    axes = [np.linspace(lo, hi, grid) for lo, hi in zip(p.joint_lower_rad, p.joint_upper_rad, strict=True)]
    q_all = np.array(list(itertools.product(*axes)))
    ok = _works(model.check_reachable, q_all)
    q = q_all[ok]
    ranges = zip(p.joint_lower_rad, p.joint_upper_rad, strict=True)
    lines = ["joint limits [rad]: " + ", ".join(f"[{lo:.3f}, {hi:.3f}]" for lo, hi in ranges)]
    if not len(q):
        return [*lines, "reach: no joint-grid point closes the forearms"]
    x = model.forward_kinematics(q)
    lines.append(f"reach: {ok.sum()} of {len(q_all)} joint-grid points close the forearms; platform extents [m]:")
    lines += _extents(x, ("x", "y", "z"))
    if description.home_position_m is not None:
        home = description.home_position_m
        q_home = model.inverse_kinematics(home[None, :])
        where = "[home]"
    else:
        q_home = ((np.asarray(p.joint_lower_rad) + np.asarray(p.joint_upper_rad)) / 2.0)[None, :]
        home = model.forward_kinematics(q_home)[0]
        where = "middle of the joint ranges"
    lines.append(f"home ({where}): x = {_vec(home)} m, q = {_vec(q_home[0])} rad")
    theta = description.tool.payload_parameters(gripping=True)
    tau = model.inverse_dynamics(q_home, np.zeros_like(q_home), np.zeros_like(q_home), theta)[0]
    lines += _static_lines(description, tau, "N m", f"tool + work piece, {theta[0]:.3f} kg")
    cond = model.jacobian_condition(q)
    worst = int(np.argmax(cond))
    lines.append(
        f"worst Jacobian condition number on the grid: {cond[worst]:.4g} at x = {_vec(x[worst])} m, "
        f"q = {_vec(q[worst])} rad (median {np.median(cond):.4g})"
    )
    return lines


def _check_hexapod(description: RobotDescription, model: HexapodModel, grid: int) -> list[str]:
    p = model.params
    home = np.asarray(p.home_position_m, dtype=float)
    span = np.linspace(-HEXAPOD_SEARCH_HALF_SPAN_M, HEXAPOD_SEARCH_HALF_SPAN_M, 2 * grid + 1)  # IK is cheap
    offsets = np.array(list(itertools.product(span, span, span)))
    positions = home + offsets
    eye = np.broadcast_to(np.eye(3), (len(positions), 3, 3))
    q = model.inverse_kinematics(positions, eye)
    ok = np.all((q >= p.leg_lower_m) & (q <= p.leg_upper_m), axis=1)
    lines = [f"leg length limits: [{p.leg_lower_m:.4f}, {p.leg_upper_m:.4f}] m"]
    lines.append(
        f"reach at zero tilt: {ok.sum()} of {len(positions)} grid positions within +-{HEXAPOD_SEARCH_HALF_SPAN_M} m "
        "of home keep every leg within its limits; extents [m]:"
    )
    if ok.any():
        lines += _extents(positions[ok], ("x", "y", "z"), box=(positions.min(axis=0), positions.max(axis=0)))
    angles = np.linspace(0.0, HEXAPOD_TILT_SEARCH_RAD, 201)
    for axis, name in enumerate(("roll", "pitch", "yaw")):
        limits = []
        for sign in (-1.0, 1.0):
            rpy = np.zeros((len(angles), 3))
            rpy[:, axis] = sign * angles
            q_t = model.inverse_kinematics(np.broadcast_to(home, (len(angles), 3)), rotation_from_xyz_angles(rpy))
            inside = np.all((q_t >= p.leg_lower_m) & (q_t <= p.leg_upper_m), axis=1)
            first_out = int(np.argmin(inside)) if not inside.all() else len(angles)
            limits.append(sign * angles[max(first_out - 1, 0)])
        lines.append(f"  {name} at home: [{limits[0]:+.3f}, {limits[1]:+.3f}] rad (searched to +-{angles[-1]:g})")
    eye1 = np.eye(3)[None]
    q_home = model.inverse_kinematics(home[None, :], eye1)
    lines.append(f"home: p = {_vec(home)} m, zero tilt, legs {_vec(q_home[0])} m")
    theta = description.tool.payload_parameters()
    zeros = np.zeros((1, 6))
    tau = model.inverse_dynamics_from_platform(home[None, :], eye1, zeros, zeros, theta)[0]
    lines += _static_lines(description, tau, "N", f"fixture {theta[0]:.3f} kg")
    if ok.any():
        cond = model.jacobian_condition(positions[ok], eye[ok])
        worst = int(np.argmax(cond))
        lines.append(
            f"worst inverse-Jacobian condition number on the grid (zero tilt): {cond[worst]:.4g} at "
            f"p = {_vec(positions[ok][worst])} m (median {np.median(cond):.4g})"
        )
    return lines


def _static_lines(description: RobotDescription, tau: Array, unit: str, payload: str) -> list[str]:
    drives = description.parameters.drives
    current = current_from_effort(tau[None, :], drives)[0]
    lines = [f"static efforts at home with the nominal payload ({payload}):"]
    for i, (t, d, c) in enumerate(zip(tau, drives, current, strict=True)):
        share = 100.0 * abs(t) / d.rated_effort
        lines.append(
            f"  actuator {i + 1}: {t:+10.4f} {unit} = {share:5.1f} % of rated {d.rated_effort:g} {unit} ({c:+.3f} A)"
        )
    return lines


def _works(check: Callable[[Array], None], q: Array) -> NDArray[np.bool_]:
    """Which rows of q pass ``check`` (which raises on the first bad row): bisect failing batches."""
    ok = np.zeros(len(q), dtype=bool)
    stack = [np.arange(len(q))]
    while stack:
        idx = stack.pop()
        try:
            check(q[idx])
        except ShadowError:
            if len(idx) > 1:
                half = len(idx) // 2
                stack += [idx[:half], idx[half:]]
            continue
        ok[idx] = True
    return ok


def _extents(x: Array, names: Sequence[str], box: tuple[Array, Array] | None = None) -> list[str]:
    """One line per axis; ``box`` (lower, upper) marks extents that reach the searched box."""
    lines = []
    for i, (n, lo, hi) in enumerate(zip(names, x.min(axis=0), x.max(axis=0), strict=True)):
        edge = box is not None and (lo <= box[0][i] or hi >= box[1][i])
        lines.append(f"  {n}: [{lo:+.4f}, {hi:+.4f}]" + (" (reaches the searched box)" if edge else ""))
    return lines


def _vec(v: Array) -> str:
    return "[" + ", ".join(f"{float(a):+.4f}" for a in v) + "]"


# ---------------------------------------------------------------------------------------------- efforts


def motion_layouts(family: str) -> dict[str, list[str]]:
    """Accepted header rows of a motion CSV, by kind ("platform" or "actuator")."""
    if family == "delta":
        return {
            "platform": ["time_s", "x_m", "y_m", "z_m"],
            "actuator": ["time_s", "q1_rad", "q2_rad", "q3_rad"],
        }
    return {
        "platform": ["time_s", "x_m", "y_m", "z_m", "roll_rad", "pitch_rad", "yaw_rad"],
        "actuator": ["time_s", *(f"q{j}_m" for j in range(1, 7))],
    }


def read_motion(path: Path, family: str) -> tuple[str, Array]:
    """(kind, values (N, columns)) of a motion CSV; errors name the line and column."""
    try:
        handle = path.open(newline="", encoding="utf-8")
    except OSError as exc:
        raise MotionFileError(f"{path}: cannot read the motion file: {exc.strerror or exc}") from exc
    with handle:
        return _parse_motion(csv.reader(handle), path, family)


def _parse_motion(reader: Any, path: Path, family: str) -> tuple[str, Array]:
    layouts = motion_layouts(family)
    try:
        header = [h.strip() for h in next(reader)]
    except StopIteration:
        raise MotionFileError(f"{path}: line 1: empty file, expected a header row") from None
    except (csv.Error, UnicodeDecodeError) as exc:
        raise MotionFileError(f"{path}: line 1: {exc}") from exc
    kind = next((k for k, cols in layouts.items() if cols == header), None)
    if kind is None:
        wanted = " or ".join(",".join(cols) for cols in layouts.values())
        raise MotionFileError(f"{path}: line 1: header {','.join(header)!r} is not one of ({family}): {wanted}")
    rows: list[list[float]] = []
    try:
        for row in reader:
            line = reader.line_num
            if not row or all(not cell.strip() for cell in row):
                continue
            if len(row) != len(header):
                raise MotionFileError(f"{path}: line {line}: expected {len(header)} columns, got {len(row)}")
            values = []
            for name, cell in zip(header, row, strict=True):
                try:
                    v = float(cell)
                except ValueError:
                    raise MotionFileError(
                        f"{path}: line {line}, column {name}: not a number: {cell.strip()!r}"
                    ) from None
                if not np.isfinite(v):
                    raise MotionFileError(f"{path}: line {line}, column {name}: not finite: {cell.strip()!r}")
                values.append(v)
            if rows and not values[0] > rows[-1][0]:
                raise MotionFileError(
                    f"{path}: line {line}, column time_s: time must increase, got {values[0]:g} after {rows[-1][0]:g}"
                )
            rows.append(values)
    except (csv.Error, UnicodeDecodeError) as exc:
        raise MotionFileError(f"{path}: line {reader.line_num}: {exc}") from exc
    if len(rows) < MIN_SAMPLES:
        raise MotionFileError(f"{path}: needs at least {MIN_SAMPLES} samples for central differences, got {len(rows)}")
    return kind, np.array(rows)


def differentiate(t: Array, f: Array) -> tuple[Array, Array]:
    """(velocity, acceleration) of f (N, k) sampled at times t (N,), see the module docstring."""
    fd = np.gradient(f, t, axis=0, edge_order=2)  # second-order central difference on uneven steps
    h_m = (t[1:-1] - t[:-2])[:, None]  # h_- = t_k - t_{k-1}
    h_p = (t[2:] - t[1:-1])[:, None]  # h_+ = t_{k+1} - t_k
    inner = 2.0 * (h_m * f[2:] - (h_m + h_p) * f[1:-1] + h_p * f[:-2]) / (h_m * h_p * (h_m + h_p))
    fdd = np.concatenate([inner[:1], inner, inner[-1:]])  # ends take their neighbour's value
    return fd, fdd


def compute_efforts(
    description: RobotDescription, kind: str, data: Array, *, friction: bool, work_piece: bool
) -> Array:
    """Actuator efforts (N, n) [N m | N] of the rigid-body model (plus nominal friction) along a motion."""
    model = build_model(description)
    t, pos = data[:, 0], data[:, 1:]
    vel, acc = differentiate(t, pos)
    theta = description.tool.payload_parameters(gripping=work_piece)
    if isinstance(model, DeltaModel):
        if kind == "platform":
            q, qd, _, tau = model.inverse_dynamics_from_platform(pos, vel, acc, theta)
            model.check_reachable(q)
        else:
            model.check_reachable(pos)
            qd, tau = vel, model.inverse_dynamics(pos, vel, acc, theta)
    else:
        if kind == "platform":
            p, rpy = pos[:, :3], pos[:, 3:]
            R = rotation_from_xyz_angles(rpy)
            twist = np.concatenate([vel[:, :3], angular_velocity_from_xyz_rates(rpy, vel[:, 3:])], axis=1)
            alpha = angular_acceleration_from_xyz_rates(rpy, vel[:, 3:], acc[:, 3:])
            accel = np.concatenate([acc[:, :3], alpha], axis=1)
            model.check_pose(p, R)
            qd = model.actuator_motion(p, R, twist, accel)[1]
            tau = model.inverse_dynamics_from_platform(p, R, twist, accel, theta)
        else:
            model.check_reachable(pos)
            qd, tau = vel, model.inverse_dynamics(pos, vel, acc, theta)
    if friction:
        if description.friction is None:
            raise DescriptionError(f"{description.source}: friction: --friction needs a [friction] section")
        nominal = description.friction
        tau = tau + friction_effort(
            qd,
            nominal.parameters(),
            smooth_velocity=nominal.smooth_velocity,
            stribeck_velocity=nominal.stribeck_velocity,
        )
    return tau


def run_efforts(args: argparse.Namespace) -> int:
    description = load_description(args.file)
    kind, data = read_motion(args.motion, description.family)
    try:
        tau = compute_efforts(description, kind, data, friction=args.friction, work_piece=args.work_piece)
    except UnreachablePoseError as exc:
        raise UnreachablePoseError(f"{args.motion}: {exc} (sample k is on line k + 2)") from exc
    unit = "nm" if description.family == "delta" else "n"
    header = ["time_s", *(f"effort{i + 1}_{unit}" for i in range(tau.shape[1]))]
    if args.output is None:
        _write_csv(sys.stdout, header, data[:, 0], tau)
    else:
        try:
            with args.output.open("w", newline="", encoding="utf-8") as out:
                _write_csv(out, header, data[:, 0], tau)
        except OSError as exc:
            raise MotionFileError(f"{args.output}: cannot write: {exc.strerror or exc}") from exc
    return 0


def _write_csv(out: TextIO, header: list[str], t: Array, tau: Array) -> None:
    writer = csv.writer(out, lineterminator="\n")
    writer.writerow(header)
    for time_s, row in zip(t, tau, strict=True):
        writer.writerow([repr(float(time_s)), *(f"{v:.10g}" for v in row)])

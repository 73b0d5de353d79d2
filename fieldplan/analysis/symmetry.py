"""Symmetry: bodies stuck alone, pairs that no field can separate, and mirror-symmetry checks of a field basis.
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass

import numpy as np

from ..errors import ActuatorError
from ..units import format_quantity
from .steerability import RTOL, Steerability, VelocitySet, body_speeds, obstructions, restrict, steerability, steerable

__all__ = ['SymmetryReport', 'symmetry_report', 'MirrorReport', 'mirror_check']

@dataclass
class SymmetryReport:
    """Bodies that are stuck alone and pairs that cannot be separated.

    Attributes
    ----------
    stuck : list of (int, Obstruction)
        Bodies that alone cannot move in some direction (e.g. on a dead line), with the direction.
    inseparable : list of (int, int, list of Obstruction)
        Pairs each steerable alone but not together (e.g. at mirror-image positions).
    """

    stuck: list
    inseparable: list

    def summary(self):
        lines = []
        for i, ob in self.stuck:
            lines.append(f"body {i} stuck: {ob.text}")
        for i, j, obs in self.inseparable:
            lines.append(f"bodies {i} and {j} cannot be separated: " + "; ".join(o.text for o in obs))
        return "\n".join(lines) if lines else "no stuck bodies and no inseparable pairs"


def symmetry_report(basis, *, rtol=RTOL):
    """Find stuck bodies and inseparable pairs in one configuration.

    Parameters
    ----------
    basis : FieldBasis
    rtol : float

    Returns
    -------
    SymmetryReport
        Obstruction texts use the bodies' indices in ``basis``.
    """
    speeds, _ = body_speeds(basis, rtol=rtol)
    stuck, ok = [], []
    for i in range(basis.n_bodies):
        if speeds[i] > 0:
            ok.append(i)
            continue
        obs = obstructions(restrict(basis, [i]), rtol=rtol, labels=[i])
        stuck.extend((i, o) for o in obs)
    pairs = []
    for a, b in itertools.combinations(ok, 2):
        sub = restrict(basis, [a, b])
        if not steerable(sub, rtol=rtol):
            pairs.append((a, b, obstructions(sub, rtol=rtol, labels=[a, b])))
    return SymmetryReport(stuck, pairs)


@dataclass
class MirrorReport:
    """Result of :func:`mirror_check`.

    Attributes
    ----------
    pair_separable : bool
        Two bodies at ``point`` and its mirror image are steerable together.
    pair : Steerability
    can_leave_line : bool
        A body at the foot of ``point`` on the line can move off it (either side).
    leave_speed : float
        m/s, largest speed normal to the line available to that body.
    line : Steerability
        Of the body on the line.
    positions : ndarray, shape (3, 2)
        m: ``point``, its mirror image, the foot point on the line.
    """

    pair_separable: bool
    pair: Steerability
    can_leave_line: bool
    leave_speed: float
    line: Steerability
    positions: np.ndarray

    def summary(self):
        return (f"mirror pair {'separable' if self.pair_separable else 'NOT separable'}; body on the line "
                f"{'can' if self.can_leave_line else 'CANNOT'} leave it "
                f"(normal speed {format_quantity(self.leave_speed, 'm/s', 4)})"
                + ("".join("\n  - " + o.text for o in self.pair.obstructions)))


def mirror_check(basis_at, point, line_point, line_direction, *, rtol=RTOL):
    """Test the two consequences of a mirror symmetry of the fields at one place.

    If every field is symmetric under reflection in a line, bodies at mirror-image positions
    move as mirror images (not separable), and a body on the line stays on it. This evaluates
    both: a pair at ``point`` and its reflection, and one body at the foot of ``point`` on the
    line.

    Parameters
    ----------
    basis_at : callable
        ``xy (n, 2) -> FieldBasis`` (see :class:`basis_function`).
    point : array_like, shape (2,)
        m, a position off the line.
    line_point : array_like, shape (2,)
        m, a point of the mirror line.
    line_direction : array_like, shape (2,)
        Direction of the line (any length).
    rtol : float

    Returns
    -------
    MirrorReport
    """
    p = np.asarray(point, dtype=float).reshape(2)
    q = np.asarray(line_point, dtype=float).reshape(2)
    u = np.asarray(line_direction, dtype=float).reshape(2)
    if not np.linalg.norm(u) > 0:
        raise ActuatorError(f"mirror_check: line_direction must be non-zero, got {u.tolist()}.")
    u = u / np.linalg.norm(u)
    foot = q + ((p - q) @ u) * u
    mirror = 2 * foot - p
    if np.linalg.norm(p - foot) <= 1e-12 * max(np.linalg.norm(p), 1e-300):
        raise ActuatorError("mirror_check: point lies on the mirror line; give a point off the line.")
    pair = steerability(basis_at(np.array([p, mirror])), rtol=rtol)
    lb = basis_at(foot[None, :])
    line = steerability(lb, rtol=rtol)
    vs = VelocitySet.from_basis(lb)
    nrm = np.array([-u[1], u[0]])
    leave = float(np.max(vs.support(np.array([nrm, -nrm])))) * vs.scale
    can_leave = bool(vs.scale > 0 and leave > rtol * vs.scale)
    return MirrorReport(pair.steerable, pair, can_leave, max(leave, 0.0), line, np.array([p, mirror, foot]))

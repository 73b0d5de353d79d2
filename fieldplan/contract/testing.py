"""The actuator contract suite, and small analytic actuators for tests and examples.

:func:`check_actuator` is the one place that says what an actuator must do. Every built-in
actuator runs it in ``tests/contract/test_actuator_contract.py``; a user's plug-in runs it in theirs::

    import fieldplan
    from fieldplan.contract.testing import check_actuator
    check_actuator(MyActuator(...), bodies=[my_bead], medium=fieldplan.water())
"""

from __future__ import annotations

import functools
import pickle
from dataclasses import dataclass, field

import numpy as np

from ..errors import ActuatorError
from ..world.physics import drag_coefficient
from .actuator import TAGS, Actuator, Channel, FieldBasis, Primitive

__all__ = ["check_actuator", "actuator_checks", "contract_failures", "CHECKS", "CheckSetup", "ContractError",
           "SourceArray"]


class ContractError(AssertionError):
    """An actuator broke the contract; the message names each failed check (``check_actuator[<check>]``).

    ``failures`` lists ``(check, message)`` of every check that failed.
    """

    def __init__(self, message, failures=()):
        super().__init__(message)
        self.failures = list(failures)


def _fail(check, actuator, message):
    raise ContractError(f"check_actuator[{check}] {type(actuator).__name__}: {message}", [(check, message)])


def _random_inputs(actuator, rng, n):
    chans = actuator.channels
    out = []
    prims = () if "affine_in_input" in actuator.tags else tuple(actuator.primitives())
    for j in range(n):
        if prims and any(c.values for c in chans):
            out.append(np.asarray(prims[j % len(prims)].values))
            continue
        u = np.array([rng.uniform(c.lower, c.upper) for c in chans])
        out.append(u)
    return out


@dataclass
class CheckSetup:
    """What every check runs on: the actuator, the bodies and medium, test points (m) and inputs."""

    actuator: Actuator
    bodies: list
    medium: object
    xy: np.ndarray
    rng: np.random.Generator
    rtol: float
    affine: bool
    inputs: list = field(default_factory=list)


def _setup(actuator, bodies, medium, points, rng, n_points, rtol):
    """Check what the other checks need (it is an Actuator, bodies and points exist), then set up."""
    rng = np.random.default_rng(rng)
    if not isinstance(actuator, Actuator):
        _fail("type", actuator, "is not a subclass of fieldplan.Actuator.")
    bodies = list(bodies)
    if not bodies:
        _fail("bodies", actuator, "give at least one body to test with.")
    if points is None:
        if actuator.extent is None:
            _fail("points", actuator, "has no extent; pass points=... to check_actuator.")
        x0, x1, y0, y1 = actuator.extent
        points = rng.uniform([x0, y0], [x1, y1], size=(n_points, 2))
    return CheckSetup(actuator, bodies, medium, np.asarray(points, dtype=float), rng, rtol,
                      "affine_in_input" in actuator.tags)


def _inputs(s):
    if not s.inputs:
        s.inputs = _random_inputs(s.actuator, s.rng, 3)
    return s.inputs


def check_channels(s):
    """``channels`` is a non-empty tuple of :class:`Channel` with unique names."""
    chans = s.actuator.channels
    if not isinstance(chans, tuple) or not chans or not all(isinstance(c, Channel) for c in chans):
        _fail("channels", s.actuator, f"channels must be a non-empty tuple of Channel, got {chans!r}.")
    names = [c.name for c in chans]
    if len(set(names)) != len(names):
        _fail("channels", s.actuator, f"channel names are not unique: {names}.")


def check_tags(s):
    """Only known tags (:data:`fieldplan.TAGS`)."""
    unknown = set(s.actuator.tags) - set(TAGS)
    if unknown:
        _fail("tags", s.actuator, f"unknown tags {sorted(unknown)}; known: {sorted(TAGS)}.")


def check_primitives(s):
    """Non-affine actuators have primitives; every primitive is a valid input; names unique."""
    if s.affine:
        return
    prims = tuple(s.actuator.primitives())
    if not prims:
        _fail("primitives", s.actuator, "is not tagged affine_in_input, so it needs primitives().")
    pn = [getattr(p, "name", None) for p in prims]
    if len(set(pn)) != len(pn):
        _fail("primitives", s.actuator, "primitive names are not unique.")
    for p in prims:
        if not isinstance(p, Primitive):
            _fail("primitives", s.actuator, f"{p!r} is not a Primitive.")
        try:
            s.actuator.check_input(p.values)
        except ActuatorError as exc:
            _fail("primitives", s.actuator, f"primitive {p.name!r} is not a valid input: {exc}")


def check_shape_finite(s):
    """``velocity`` returns a finite float array of shape (n, 2)."""
    for body in s.bodies:
        for u in _inputs(s):
            v = s.actuator.velocity(body, s.medium, s.xy, u)
            if not isinstance(v, np.ndarray) or v.shape != s.xy.shape or v.dtype.kind != "f":
                _fail("shape_finite", s.actuator, f"velocity returned {type(v).__name__} shape "
                      f"{getattr(v, 'shape', None)}, expected float ndarray {s.xy.shape}.")
            if not np.all(np.isfinite(v)):
                _fail("shape_finite", s.actuator, f"velocity is not finite for body {body.name!r}.")


def check_vectorised(s):
    """One call over all points equals one call per point."""
    xy = s.xy
    for body in s.bodies:
        for u in _inputs(s):
            v = s.actuator.velocity(body, s.medium, xy, u)
            single = np.vstack([s.actuator.velocity(body, s.medium, xy[i:i + 1], u) for i in range(len(xy))])
            scale = max(np.max(np.abs(v)), 1e-300)
            if not np.allclose(single, v, rtol=s.rtol, atol=s.rtol * scale):
                _fail("vectorised", s.actuator, f"one call over {len(xy)} points differs from per-point calls "
                      f"(max difference {np.max(np.abs(single - v)):.3g} m/s, body {body.name!r}).")


def check_affine_in_input(s):
    """If tagged: ``v(a u1 + (1 - a) u2) = a v(u1) + (1 - a) v(u2)``."""
    if not s.affine:
        return
    u1, u2 = _inputs(s)[:2]
    a = 0.3
    for body in s.bodies:
        vel = s.actuator.velocity
        lhs = vel(body, s.medium, s.xy, a * u1 + (1 - a) * u2)
        rhs = a * vel(body, s.medium, s.xy, u1) + (1 - a) * vel(body, s.medium, s.xy, u2)
        scale = max(np.max(np.abs(rhs)), 1e-300)
        if not np.allclose(lhs, rhs, rtol=1e-6, atol=1e-6 * scale):
            _fail("affine_in_input", s.actuator, f"declared affine, but velocity is not affine in u for "
                  f"body {body.name!r} (max deviation {np.max(np.abs(lhs - rhs)) / scale:.3g} relative).")


def check_zero_idle(s):
    """If tagged: the idle input gives zero velocity."""
    if "zero_idle" not in s.actuator.tags:
        return
    for body in s.bodies:
        v0 = s.actuator.velocity(body, s.medium, s.xy, s.actuator.idle_input())
        if np.max(np.abs(v0)) > 0:
            _fail("zero_idle", s.actuator, f"declared zero_idle, but the idle input moves body {body.name!r} "
                  f"at up to {np.max(np.abs(v0)):.3g} m/s.")


def check_basis(s):
    """``basis()`` agrees with ``velocity()`` for every field, and its predicted displacement matches.

    Linear mode: unit responses; timeshare: primitive velocity minus idle velocity; checked for a
    mixed set of bodies at the first points.
    """
    actuator, medium, bodies = s.actuator, s.medium, s.bodies
    n = min(len(s.xy), 2 * len(bodies) + 1)
    bl = [bodies[i % len(bodies)] for i in range(n)]
    pos = s.xy[:n]
    basis = actuator.basis(bl, medium, pos)
    if not isinstance(basis, FieldBasis):
        _fail("basis", actuator, f"basis() returned {type(basis).__name__}, not FieldBasis.")
    if basis.fields.shape[1:] != (n, 2):
        _fail("basis", actuator, f"basis fields have shape {basis.fields.shape}, expected (K, {n}, 2).")
    if not np.all(np.isfinite(basis.fields)) or not np.all(np.isfinite(basis.drift)):
        _fail("basis", actuator, "basis fields are not finite.")
    if s.affine != (basis.mode == "linear"):
        _fail("basis", actuator, f"tags say affine={s.affine} but basis mode is {basis.mode!r}.")
    T = 0.7

    def vel_all(u):
        return np.vstack([actuator.velocity(b, medium, pos[i:i + 1], u) for i, b in enumerate(bl)])

    if basis.mode == "linear":
        u = _inputs(s)[0]
        want = T * vel_all(u)
        got = basis.displacement(u, T)
        segs = basis.to_segments(u, T)
        if len(segs) != 1 or not np.allclose(segs[0].values, u):
            _fail("basis", actuator, "linear to_segments must give one segment holding the input.")
    else:
        w = s.rng.uniform(0, 1, basis.size)
        w *= T / w.sum() * 0.8
        got = basis.displacement(w, T)
        want = (T - w.sum()) * vel_all(basis.idle)
        for k, p in enumerate(basis.primitives):
            want = want + w[k] * vel_all(p.values)
        segs = basis.to_segments(w, T)
        total = sum(sg.duration for sg in segs)
        if not np.isclose(total, T, rtol=1e-9):
            _fail("basis", actuator, f"to_segments covers {total} s of a {T} s period.")
        for sg in segs:
            actuator.check_input(sg.values)
    scale = max(np.max(np.abs(want)), 1e-300)
    if not np.allclose(got, want, rtol=s.rtol * 100, atol=1e-5 * scale):
        _fail("basis", actuator, f"basis displacement differs from integrating velocity() "
              f"(max relative deviation {np.max(np.abs(got - want)) / scale:.3g}).")


def check_bad_input(s):
    """Wrong input length, NaN input, out-of-bounds input and malformed positions raise :class:`ActuatorError`."""
    actuator, chans = s.actuator, s.actuator.channels
    body, good, xy = s.bodies[0], _inputs(s)[0], s.xy
    bad_cases = {
        "wrong input length": (xy, np.append(good, 0.0)),
        "NaN input": (xy, np.where(np.arange(len(good)) == 0, np.nan, good)),
        "out-of-bounds input": (xy, np.where(np.arange(len(good)) == 0,
                                             chans[0].upper + 1.0 + abs(chans[0].upper), good)),
        "positions of shape (n, 3)": (np.zeros((3, 3)), good),
        "NaN position": (np.array([[np.nan, 0.0]]), good),
    }
    for what, (p, u) in bad_cases.items():
        try:
            actuator.velocity(body, s.medium, p, u)
        except ActuatorError:
            continue
        except Exception as exc:  # noqa: BLE001 - we report what was raised instead
            _fail("bad_input", actuator, f"{what} raised {type(exc).__name__} ({exc}), expected ActuatorError.")
        _fail("bad_input", actuator, f"{what} was accepted; it must raise ActuatorError.")


def check_pickle(s):
    """A pickled and restored actuator gives the same velocity (needed for process pools)."""
    actuator, body, good = s.actuator, s.bodies[0], _inputs(s)[0]
    try:
        clone = pickle.loads(pickle.dumps(actuator))
    except Exception as exc:  # noqa: BLE001
        _fail("pickle", actuator, f"cannot be pickled ({type(exc).__name__}: {exc}).")
    a = actuator.velocity(body, s.medium, s.xy, good)
    b = clone.velocity(body, s.medium, s.xy, good)
    if not np.allclose(a, b, rtol=1e-12, atol=0):
        _fail("pickle", actuator, "a pickled copy gives a different velocity.")


#: The named checks of the contract, in the order they run (each a function of a :class:`CheckSetup`).
CHECKS = {
    "channels": check_channels,
    "tags": check_tags,
    "primitives": check_primitives,
    "shape_finite": check_shape_finite,
    "vectorised": check_vectorised,
    "affine_in_input": check_affine_in_input,
    "zero_idle": check_zero_idle,
    "basis": check_basis,
    "bad_input": check_bad_input,
    "pickle": check_pickle,
}

# Checks the others build on: when one of these fails, the rest are not run (they would only
# report the same problem again, or crash on it).
_PREREQUISITES = ("channels",)


def actuator_checks(actuator, bodies, medium, points=None, rng=0, n_points=24, rtol=1e-7):
    """The contract as ``(name, check)`` pairs, each ``check()`` raising :class:`ContractError` on failure.

    For a test suite that reports each check on its own (as scikit-learn's
    ``parametrize_with_checks`` does)::

        @pytest.mark.parametrize("name, check", actuator_checks(MyActuator(), [bead], water()))
        def test_contract(name, check):
            check()

    Parameters are those of :func:`check_actuator`. The set-up (random points and inputs) is made
    once and shared, so the checks see the same data as :func:`check_actuator`.
    """
    s = _setup(actuator, bodies, medium, points, rng, n_points, rtol)
    return [(name, functools.partial(fn, s)) for name, fn in CHECKS.items()]


def contract_failures(actuator, bodies, medium, points=None, rng=0, n_points=24, rtol=1e-7):
    """Run every check; the list of ``(check, message)`` that failed (empty: the contract holds).

    A check that raises anything but :class:`ContractError` fails with what it raised.
    """
    try:
        checks = actuator_checks(actuator, bodies, medium, points, rng, n_points, rtol)
    except ContractError as exc:
        return exc.failures
    name = type(actuator).__name__
    failures = []
    for check, fn in checks:
        try:
            fn()
        except ContractError as exc:
            failures += exc.failures
        except Exception as exc:  # noqa: BLE001 - a user's model may raise anything; report it, go on
            failures.append((check, f"raised {type(exc).__name__}: {exc}"))
        if failures and check in _PREREQUISITES:
            failures.append(("skipped", f"the other checks need valid channels; fix {name}.channels first."))
            break
    return failures


def check_actuator(actuator, bodies, medium, points=None, rng=0, n_points=24, rtol=1e-7):
    """Run the actuator contract suite; raise :class:`ContractError` listing every failed check.

    Returns ``None`` when every check passes, so it reads as an assertion in a user's own tests.
    Each check also runs on its own: :func:`actuator_checks`; :func:`contract_failures` returns
    the failures as a list instead of raising.

    Parameters
    ----------
    actuator : Actuator
        The model under test.
    bodies : sequence of Body
        Bodies the actuator claims to move (use several kinds to check heterogeneous handling).
    medium : Medium
    points : array_like, shape (n, 2), optional
        Positions (m) to test at; default ``n_points`` random points inside ``actuator.extent``.
    rng : int or numpy.random.Generator
        Seed of the random inputs and points.
    rtol : float
        Relative tolerance of the consistency checks.

    Raises
    ------
    ContractError
        One line ``check_actuator[<check>] <class>: <what is wrong>`` per failed check (the keys
        of :data:`CHECKS`; ``type``, ``bodies`` or ``points`` when the suite cannot start), and
        ``failures`` holding them as ``(check, message)``.

    Examples
    --------
    >>> import fieldplan
    >>> act = SourceArray([[0, 0], [1e-3, 0], [0, 1e-3]])
    >>> bead = fieldplan.Body("bead", radius=2e-6, density=1100.0)
    >>> check_actuator(act, [bead], fieldplan.water())
    >>> sorted(CHECKS)[:3]
    ['affine_in_input', 'bad_input', 'basis']
    """
    failures = contract_failures(actuator, bodies, medium, points, rng, n_points, rtol)
    if failures:
        name = type(actuator).__name__
        lines = [f"check_actuator[{c}] {name}: {m}" for c, m in failures]
        head = "" if len(lines) == 1 else f"{name} fails {len(failures)} contract checks:\n"
        raise ContractError(head + "\n".join(lines), failures)


class SourceArray(Actuator):
    """Analytic test actuator: channel ``k`` pulls bodies toward point source ``k``.

    The force of source ``k`` on a body at ``x`` is
    ``u_k * force * core * (s_k - x) / (|s_k - x|^2 + core^2)`` — the shape of a softened
    2-D point source, invented for tests and demos (not a model of real hardware). Velocity is
    force over the Stokes/Faxen drag of the body, so bodies of different radius move at different
    speeds. With ``affine=True`` the input enters linearly (tag ``affine_in_input``); with
    ``affine=False`` it enters as ``u_k |u_k|`` and the planner must time-share primitives.

    Parameters
    ----------
    sources : array_like, shape (K, 2)
        Source positions, m.
    force : float
        Peak force scale, N, at unit input and distance ``core``.
    core : float
        Softening length, m (default: a tenth of the sources' spread).
    bound : float
        Channels are dimensionless in ``[-bound, bound]``.
    affine : bool
    extent : tuple, optional
        (xmin, xmax, ymin, ymax) m; default the sources' bounding box.
    """

    def __init__(self, sources, force=1e-12, core=None, bound=1.0, affine=True, extent=None):
        s = np.asarray(sources, dtype=float)
        if s.ndim != 2 or s.shape[1] != 2 or len(s) == 0:
            raise ActuatorError(f"SourceArray sources must have shape (K, 2), got {s.shape}.")
        self.sources = s
        self.force = float(force)
        span = float(np.max(np.ptp(s, axis=0))) if len(s) > 1 else 1e-3
        self.core = float(core) if core is not None else 0.1 * max(span, 1e-9)
        if not self.core > 0:
            raise ActuatorError(f"SourceArray core must be > 0 m, got {core}.")
        self.bound = float(bound)
        self.affine = bool(affine)
        if extent is None:
            lo, hi = s.min(axis=0), s.max(axis=0)
            extent = (lo[0], hi[0], lo[1], hi[1])
        self.extent = tuple(float(v) for v in extent)
        self.tags = frozenset({"affine_in_input", "zero_idle"} if affine else {"zero_idle"})
        self._channels = tuple(Channel(f"source_{k + 1}", "1", -self.bound, self.bound) for k in range(len(s)))

    @property
    def channels(self):
        return self._channels

    def _shapes(self, xy):
        d = self.sources[None, :, :] - xy[:, None, :]            # (n, K, 2)
        return self.core * d / (np.sum(d * d, axis=2, keepdims=True) + self.core**2)

    def basis(self, bodies, medium, xy):
        """Exact field basis in one vectorised pass (the generic one calls velocity K+1 times)."""
        xy = self.check_points(xy)
        if len(bodies) != len(xy):
            raise ActuatorError(f"basis: {len(bodies)} bodies but {len(xy)} positions.")
        for b in set(bodies):
            self.check_body(b, medium)
        mob = np.array([1.0 / drag_coefficient(b, medium) for b in bodies])      # (n,)
        unit = self.force * self._shapes(xy) * mob[:, None, None]              # (n, K, 2) per unit gain
        unit = np.transpose(unit, (1, 0, 2))                                   # (K, n, 2)
        zero = np.zeros(xy.shape)
        if self.affine:
            return FieldBasis("linear", unit, zero, self.channels, idle=self.idle_input())
        prims = self.primitives()
        gains = np.array([np.asarray(p.values) * np.abs(p.values) for p in prims])   # (P, K)
        fields = np.tensordot(gains, unit, axes=1)
        return FieldBasis("timeshare", fields, zero, self.channels, primitives=prims, idle=self.idle_input())

    def _velocity(self, body, medium, xy, u):
        shape = self._shapes(xy)
        gain = u if self.affine else u * np.abs(u)
        f = self.force * np.einsum("k,nkd->nd", gain, shape)
        return f / drag_coefficient(body, medium)

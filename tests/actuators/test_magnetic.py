"""Tests of actuators.magnetic: loop field, gradient, finite coils, bead forces, the CoilArray actuator.

Every physics check names its source (see ../shared/CHECKS.md) beside it.
"""

import math
import pickle

import numpy as np
import pytest
from scipy.constants import mu_0
from scipy.spatial.transform import Rotation

from fieldplan.actuators.magnetic import (
    BEAD_MODELS,
    Coil,
    CoilArray,
    _coaxial_sum,
    bead_force,
    bead_model,
    effective_susceptibility,
    helmholtz_pair,
    loop_field,
    loop_field_gradient,
    maxwell_pair,
    plot_field,
)
from fieldplan import Body, Primitive, water
from fieldplan.contract.schedule import ChannelLimit, Schedule
from fieldplan.contract.testing import check_actuator
from fieldplan.errors import ActuatorError, LimitError


def on_axis_bz(z, a=1.0, current=1.0):
    """Jackson, Classical Electrodynamics 3rd ed. §5.5: Bz = mu0 I a^2 / (2 (a^2 + z^2)^(3/2))."""
    return mu_0 * current * a**2 / (2.0 * (a**2 + z**2) ** 1.5)


def on_axis_dbz(z, a=1.0, current=1.0):
    """d/dz of Jackson's on-axis law [derived]: -3 mu0 I a^2 z / (2 (a^2 + z^2)^(5/2))."""
    return -3.0 * mu_0 * current * a**2 * z / (2.0 * (a**2 + z**2) ** 2.5)


def numeric_jacobian(f, pts, h):
    """Central differences of a field f(points) -> (n, 3): G[n, i, j] = dB_i/dx_j."""
    G = np.empty((len(pts), 3, 3))
    for j in range(3):
        e = np.zeros(3)
        e[j] = h
        G[:, :, j] = (f(pts + e) - f(pts - e)) / (2 * h)
    return G


# ------------------------------------------------------------------------------------------------
# Circular loop
# ------------------------------------------------------------------------------------------------

def test_on_axis_values_jackson():
    # Jackson §5.5 (CHECKS.md): a = 1 m, I = 1 A: z = 0 -> 6.283185307e-7 T, z = 1 m -> 2.221441469e-7 T.
    b = loop_field([[0, 0, 0], [0, 0, 1.0]], radius=1.0)
    np.testing.assert_allclose(b[:, 2], [6.283185307e-7, 2.221441469e-7], rtol=1e-9)
    np.testing.assert_array_equal(b[:, :2], 0.0)
    z = np.linspace(-50, 50, 401)
    pts = np.column_stack([0 * z, 0 * z, z])
    np.testing.assert_allclose(loop_field(pts, 1.0)[:, 2], on_axis_bz(z), rtol=1e-13)


def test_on_axis_gradient():
    # d/dz of Jackson's on-axis law [derived]; off-axis terms from div B = 0 and axial symmetry:
    # dBx/dx = dBy/dy = -dBz/dz / 2 on the axis.
    z = np.linspace(-5, 5, 41)
    pts = np.column_stack([0 * z, 0 * z, z])
    G = loop_field_gradient(pts, 1.0)
    np.testing.assert_allclose(G[:, 2, 2], on_axis_dbz(z), rtol=1e-12, atol=1e-22)
    np.testing.assert_allclose(G[:, 0, 0], -0.5 * on_axis_dbz(z), rtol=1e-12, atol=1e-22)
    np.testing.assert_allclose(G[:, 1, 1], -0.5 * on_axis_dbz(z), rtol=1e-12, atol=1e-22)
    off = G.copy()
    for i in range(3):
        off[:, i, i] = 0
    assert np.abs(off).max() < 1e-12 * np.abs(G).max()


def test_off_axis_exact_simpson():
    # Simpson, Lane, Immer, Youngquist 2001 (NASA tech. report), values from CHECKS.md, a = 1, I = 1:
    # (rho, z) = (0.5, 0) -> Bz = 7.82646512e-7; (0.5, 0.5) -> B_rho = 1.61689084e-7, Bz = 4.34584894e-7.
    b = loop_field([[0.5, 0, 0], [0.5, 0, 0.5]], radius=1.0)
    np.testing.assert_allclose(b[0, 2], 7.82646512e-7, rtol=1e-8)
    np.testing.assert_allclose(b[1, 0], 1.61689084e-7, rtol=1e-8)
    np.testing.assert_allclose(b[1, 2], 4.34584894e-7, rtol=1e-8)
    # Axial symmetry: the same rho in another azimuth gives the rotated field.
    b2 = loop_field([[0, -0.5, 0.5]], radius=1.0)[0]
    np.testing.assert_allclose(b2, [0, -1.61689084e-7, 4.34584894e-7], rtol=1e-8, atol=1e-20)


def test_near_axis_stable():
    # rho = 1e-9 a (CHECKS.md asks for it): Bz is the on-axis value (Jackson) and B_rho equals
    # -(rho/2) dBz/dz from div B = 0 [derived], to full relative precision -- the textbook form
    # loses all digits of B_rho here.
    z = np.array([-2.0, -0.3, 0.0, 0.4, 1.0, 3.0])
    for rho in (1e-9, 1e-12, 1e-6):
        b = loop_field(np.column_stack([np.full_like(z, rho), 0 * z, z]), 1.0)
        np.testing.assert_allclose(b[:, 2], on_axis_bz(z), rtol=1e-11)
        want = -0.5 * rho * on_axis_dbz(z)
        np.testing.assert_allclose(b[:, 0], want, rtol=max(1e-11, 10 * rho), atol=1e-30)


def test_on_and_near_wire():
    # Ideal filament: infinite on the wire, finite (and growing like 1/d, Biot-Savart of a straight
    # wire nearby: mu0 I / (2 pi d), textbook) a hair off it.
    assert not np.all(np.isfinite(loop_field([[1.0, 0, 0]], 1.0)))
    for d in (1e-3, 1e-6, 1e-9):
        pts = np.array([[1 + d, 0, 0], [1 - d, 0, 0], [1, 0, d], [1, 0, -d]])
        b = loop_field(pts, 1.0)
        assert np.all(np.isfinite(b))
        np.testing.assert_allclose(np.linalg.norm(b, axis=1), mu_0 / (2 * np.pi * d), rtol=5 * d * abs(np.log(d)) + 1e-9)
        G = loop_field_gradient(pts, 1.0)
        assert np.all(np.isfinite(G))


def test_far_field_dipole():
    # Far field -> dipole m = pi a^2 I [pub, Jackson §5.6]: B = mu0/(4 pi r^3) (3 (m.r) r/r^2 - m).
    rng = np.random.default_rng(3)
    dirs = rng.normal(size=(50, 3))
    dirs /= np.linalg.norm(dirs, axis=1, keepdims=True)
    r = 1e4
    pts = dirs * r
    m = np.array([0, 0, np.pi])
    want = mu_0 / (4 * np.pi * r**3) * (3 * (dirs @ m)[:, None] * dirs - m)
    b = loop_field(pts, 1.0)
    err = np.linalg.norm(b - want, axis=1) / np.linalg.norm(want, axis=1)
    assert err.max() < 1e-7            # corrections are O((a/r)^2) = 1e-8


def test_against_magpylib():
    """magpylib.current.Circle (general-purpose reference library, CHECKS.md), >= 1000 points per loop.

    rtol 1e-8 on the field vector at every point, including points within 1e-6 radius of the axis
    (where the radial component alone is also compared to rtol 1e-8, in the loop's frame) and
    points down to 1e-4 radius from the wire (the radial component carries the input's own
    conditioning as extra tolerance, see below). Closer to the wire the comparison is looser,
    1e-8 * (1e-4 a / d): the input position's own rounding (eps |x| / d) dominates there.
    """
    magpy = pytest.importorskip("magpylib")
    rng = np.random.default_rng(12)
    loops = [(0.01, (0.0, 0.0, 0.0)), (0.3, (0.1, -0.2, 0.05)), (2.5, (-1.0, 3.0, 2.0)), (0.004, (0.01, 0.0, -0.02))]
    for k, (a, c) in enumerate(loops):
        c = np.asarray(c)
        rot = Rotation.random(random_state=k + 1)
        n = rot.apply([0, 0, 1.0])
        e1 = rot.apply([1.0, 0, 0])
        e2 = rot.apply([0, 1.0, 0])
        current = rng.uniform(-5, 5)
        bulk = c + a * rng.uniform(-3, 3, size=(1000, 3))
        t = rng.uniform(-3, 3, 200) * a
        eps = 10 ** rng.uniform(-12, -5, 200) * a      # most within 1e-6 a of the axis
        ang = rng.uniform(0, 2 * np.pi, 200)
        axial = c + t[:, None] * n + eps[:, None] * (np.cos(ang)[:, None] * e1 + np.sin(ang)[:, None] * e2)
        d = 10 ** rng.uniform(-7, -1, 200) * a
        wire = c + a * (np.cos(ang)[:, None] * e1 + np.sin(ang)[:, None] * e2)
        jitter = rng.normal(size=(200, 3))
        near = wire + d[:, None] * jitter / np.linalg.norm(jitter, axis=1, keepdims=True)
        pts = np.vstack([bulk, axial, near])
        src = magpy.current.Circle(current=current, diameter=2 * a, position=c, orientation=rot)
        want = src.getB(pts)
        got = loop_field(pts, a, center=c, axis=n, current=current)
        # distance of each point from the wire, for the stated loosening
        loc = rot.inv().apply(pts - c)
        dist = np.hypot(np.hypot(loc[:, 0], loc[:, 1]) - a, loc[:, 2])
        tol = 1e-8 * np.maximum(1.0, 1e-4 * a / dist)
        err = np.linalg.norm(got - want, axis=1) / np.linalg.norm(want, axis=1)
        assert np.all(err <= tol), f"loop {k}: worst {np.max(err / tol):.3g} x tolerance"
        # radial component in the loop frame near the axis (the cancellation-prone one)
        sl = slice(1000, 1200)
        rhat = (loc[sl, :2] / np.linalg.norm(loc[sl, :2], axis=1, keepdims=True))
        br_got = np.einsum("ij,ij->i", rot.inv().apply(got[sl])[:, :2], rhat)
        br_want = np.einsum("ij,ij->i", rot.inv().apply(want[sl])[:, :2], rhat)
        # ... to rtol 1e-8 plus the conditioning of the comparison itself: a point given in global
        # coordinates has its distance from the axis known only to ~eps |x| (relative eps |x| / rho),
        # and rotating B into the loop frame adds ~eps |B| to the tiny radial component.
        rho = np.linalg.norm(loc[sl, :2], axis=1)
        eps = np.finfo(float).eps
        cond = 10 * eps * ((np.linalg.norm(pts[sl], axis=1) + np.linalg.norm(c)) / rho
                           + np.linalg.norm(want[sl], axis=1) / np.abs(br_want))
        assert np.all(np.abs(br_got - br_want) <= (1e-8 + cond) * np.abs(br_want))
        assert np.sum(cond < 1e-8) >= 10          # the check is not vacuous


def test_gradient_central_differences_and_curl_div():
    # Analytic Jacobian vs central differences of the exact field (h = 1e-6 a: truncation ~1e-12,
    # rounding ~1e-10 relative); and the field itself is curl- and divergence-free (Maxwell's
    # equations in current-free space), checked on the finite differences so the check exercises
    # loop_field, not the by-construction symmetry of loop_field_gradient.
    rng = np.random.default_rng(5)
    a, c, n, cur = 0.7, np.array([0.1, -0.2, 0.3]), np.array([0.3, -0.5, 0.8]), 2.0
    nu = n / np.linalg.norm(n)
    pts = c + rng.normal(size=(400, 3)) * a
    perp = np.cross(nu, [1.0, 0, 0])
    perp /= np.linalg.norm(perp)
    pts = np.vstack([pts, c + np.outer(rng.uniform(-2, 2, 40), nu) + 1e-9 * perp])   # near the axis
    loc_rho = np.linalg.norm(np.cross(pts - c, nu), axis=1)
    loc_z = (pts - c) @ nu
    keep = np.hypot(loc_rho - a, loc_z) > 0.05 * a
    pts = pts[keep]

    def f(p):
        return loop_field(p, a, c, n, cur)

    G = loop_field_gradient(pts, a, c, n, cur)
    Gn = numeric_jacobian(f, pts, 1e-6 * a)
    scale = np.linalg.norm(G, axis=(1, 2))
    err = np.linalg.norm(G - Gn, axis=(1, 2)) / scale
    assert err.max() < 1e-6
    div = np.trace(Gn, axis1=1, axis2=2)
    curl = np.stack([Gn[:, 2, 1] - Gn[:, 1, 2], Gn[:, 0, 2] - Gn[:, 2, 0], Gn[:, 1, 0] - Gn[:, 0, 1]], axis=1)
    assert np.abs(div / scale).max() < 1e-6
    assert (np.linalg.norm(curl, axis=1) / scale).max() < 1e-6
    # and the analytic one is symmetric and traceless to rounding
    assert np.abs(G - G.transpose(0, 2, 1)).max() < 1e-14 * scale.max()
    assert np.abs(np.trace(G, axis1=1, axis2=2)).max() < 1e-14 * scale.max()


def test_loop_bad_input():
    with pytest.raises(ActuatorError, match="radius"):
        loop_field([0, 0, 1], radius=0.0)
    with pytest.raises(ActuatorError, match="radius"):
        loop_field([0, 0, 1], radius=-1.0)
    with pytest.raises(ActuatorError, match="axis.*non-zero"):
        loop_field([0, 0, 1], radius=1.0, axis=(0, 0, 0))
    with pytest.raises(ActuatorError, match="axis.*non-zero"):
        loop_field_gradient([0, 0, 1], radius=1.0, axis=(0, 0, 0))
    with pytest.raises(ActuatorError, match=r"shape \(n, 3\)"):
        loop_field(np.zeros((4, 2)), radius=1.0)
    with pytest.raises(ActuatorError, match="finite"):
        loop_field([0, 0, 1], radius=1.0, current=np.nan)


# ------------------------------------------------------------------------------------------------
# Coil pairs and finite coils
# ------------------------------------------------------------------------------------------------

def test_helmholtz_centre_field():
    # Helmholtz pair, spacing R [pub, textbook]: B0 = (4/5)^(3/2) mu0 N I / R;
    # N = 100, I = 1 A, R = 0.1 m -> 8.99176286e-4 T (CHECKS.md).
    pair = helmholtz_pair(0.1, 100, current_limit=1.0)
    b = sum(c.field([0, 0, 0], 1.0) for c in pair)[0]
    np.testing.assert_allclose(b[2], 8.99176286e-4, rtol=1e-8)
    np.testing.assert_allclose(b[2], (4 / 5) ** 1.5 * mu_0 * 100 / 0.1, rtol=1e-13)
    # and it is flat there: the first three axial derivatives vanish (Helmholtz condition), so
    # Bz changes by only O((z/R)^4) at z = R/100.
    b1 = sum(c.field([0, 0, 0.001], 1.0) for c in pair)[0]
    assert abs(b1[2] / b[2] - 1) < 1e-7


def test_maxwell_pair_gradient():
    # Opposed pair, half-spacing d [derived from the on-axis law, CHECKS.md]:
    # dBz/dz = 3 mu0 N I R^2 d / (R^2 + d^2)^(5/2); Maxwell spacing 2d = sqrt(3) R -> 0.6412934 mu0 N I / R^2.
    R, N, I = 0.05, 200, 1.5
    pair = maxwell_pair(R, N, current_limit=2.0)
    G = sum(c.field([0, 0, 0], I, gradient=True)[1] for c in pair)[0]
    np.testing.assert_allclose(abs(G[2, 2]), 0.6412934 * mu_0 * N * I / R**2, rtol=1e-6)
    d = 0.3 * R
    pair = helmholtz_pair(R, N, current_limit=2.0, opposed=True, spacing=2 * d)
    G = sum(c.field([0, 0, 0], I, gradient=True)[1] for c in pair)[0]
    np.testing.assert_allclose(abs(G[2, 2]), 3 * mu_0 * N * I * R**2 * d / (R**2 + d**2) ** 2.5, rtol=1e-12)
    b = sum(c.field([0, 0, 0], I) for c in pair)[0]
    assert np.linalg.norm(b) < 1e-15 * abs(G[2, 2]) * R


def test_finite_solenoid_on_axis_textbook():
    # Finite single-layer solenoid on its axis [pub, textbook]: B = mu0 n I / 2 (cos th2 - cos th1),
    # i.e. mu0 n I / 2 [(z + L/2)/sqrt(a^2 + (z + L/2)^2) - (z - L/2)/sqrt(a^2 + (z - L/2)^2)].
    a, L, N, I = 0.01, 0.04, 400, 2.0
    coil = Coil((0, 0, 0), (0, 0, 1), a, N, L, current_limit=5.0)
    z = np.concatenate([np.linspace(-0.015, 0.015, 7), [0.025, 0.03, 0.06, -0.1]])
    pts = np.column_stack([0 * z, 0 * z, z])
    want = mu_0 * N / L * I / 2 * ((z + L / 2) / np.hypot(a, z + L / 2) - (z - L / 2) / np.hypot(a, z - L / 2))
    np.testing.assert_allclose(coil.field(pts, I)[:, 2], want, rtol=1e-7)


def test_thick_coil_on_axis_closed_form():
    # Thick coil of uniform current density J on its axis [derived by integrating Jackson's on-axis
    # law over the cross-section]: B = mu0 J / 2 [[zeta ln(r + sqrt(r^2 + zeta^2))]]_{r1..r2, zeta1..zeta2}.
    a, L, N, I, t = 0.01, 0.02, 300, 1.0, 0.006
    coil = Coil((0.0, 0.0, 0.0), (0, 0, 1), a, N, L, layers=5, thickness=t, current_limit=2.0)
    r1, r2 = a - t / 2, a + t / 2
    Jd = N * I / (L * t)
    z = np.array([-0.03, -0.012, -0.005, 0.0, 0.004, 0.011, 0.05])

    def prim(zeta, r):
        return zeta * np.log(r + np.sqrt(r * r + zeta * zeta))

    z1, z2 = -L / 2 - z, L / 2 - z
    want = mu_0 * Jd / 2 * ((prim(z2, r2) - prim(z2, r1)) - (prim(z1, r2) - prim(z1, r1)))
    got = coil.field(np.column_stack([0 * z, 0 * z, z]), I)[:, 2]
    np.testing.assert_allclose(got, want, rtol=1e-7)


def test_coil_quadrature_error_bound():
    # The stated bound (Coil notes): realised relative error <= rtol from 0.05 to 10 radii from the
    # winding, against a 64 x 64-node reference. Bernstein-ellipse rule for Gauss-Legendre
    # (Trefethen, Approximation Theory and Approximation Practice, ch. 19; from memory).
    rng = np.random.default_rng(0)
    coil = Coil((0.001, -0.002, 0.003), (0.2, 0.1, 1.0), 0.01, 300, 0.02, layers=6, current_limit=3.0)
    n = coil.unit_axis
    e1 = np.cross(n, [1.0, 0, 0])
    e1 /= np.linalg.norm(e1)
    e2 = np.cross(n, e1)
    s, r, w = coil.loops(64, 64)
    for rtol in (1e-5, 1e-7):
        for dist in (0.05, 0.3, 1.0, 3.0, 10.0):
            # above the end face and beside the outer surface, at `dist` radii
            rho = rng.uniform(0, 2 * coil.radius, 30)
            ph = rng.uniform(0, 2 * np.pi, 30)
            zl = np.concatenate([np.full(15, coil.length / 2 + dist * coil.radius),
                                 rng.uniform(-coil.length / 2, coil.length / 2, 15)])
            rho[15:] = coil.outer_radius + dist * coil.radius
            pts = (np.asarray(coil.center) + zl[:, None] * n
                   + rho[:, None] * (np.cos(ph)[:, None] * e1 + np.sin(ph)[:, None] * e2))
            ref = _coaxial_sum(pts, np.asarray(coil.center)[None], n[None], np.array([0]), s, r, w, False)[0][0]
            got = coil.field(pts, 1.0, rtol=rtol)
            err = np.linalg.norm(got - ref, axis=1) / np.linalg.norm(ref, axis=1)
            assert err.max() <= rtol, (rtol, dist, err.max(), coil.nodes(pts, rtol))


def test_coil_gradient_central_differences():
    # Coil Jacobian is the sum of analytic loop Jacobians: vs central differences of Coil.field.
    coil = Coil((0, 0, -0.01), (0, 0.3, 1.0), 0.006, 200, 0.01, layers=4, current_limit=3.0)
    rng = np.random.default_rng(8)
    pts = np.column_stack([rng.uniform(-0.01, 0.01, (30, 2)), np.full(30, 0.002)])
    order = coil.nodes(pts)
    s, r, w = coil.loops(*order)

    def f(p):
        return _coaxial_sum(p, np.asarray(coil.center)[None], coil.unit_axis[None], np.array([0]), s, r, w, False)[0][0]

    B, G = coil.field(pts, 1.0, gradient=True)
    Gn = numeric_jacobian(f, pts, 1e-8)
    err = np.linalg.norm(G - Gn, axis=(1, 2)) / np.linalg.norm(G, axis=(1, 2))
    assert err.max() < 1e-6


def test_coil_bad_input():
    with pytest.raises(ActuatorError, match="radius"):
        Coil((0, 0, 0), (0, 0, 1), 0.0, 100, current_limit=1.0)
    with pytest.raises(ActuatorError, match="axis.*non-zero"):
        Coil((0, 0, 0), (0, 0, 0), 0.01, 100, current_limit=1.0)
    with pytest.raises(ActuatorError, match="current_limit"):
        Coil((0, 0, 0), (0, 0, 1), 0.01, 100)
    with pytest.raises(ActuatorError, match="thickness"):
        Coil((0, 0, 0), (0, 0, 1), 0.01, 100, 0.01, thickness=0.03, current_limit=1.0)
    with pytest.raises(ActuatorError, match="layers"):
        Coil((0, 0, 0), (0, 0, 1), 0.01, 100, layers=0, current_limit=1.0)
    with pytest.raises(ActuatorError, match="core_gain"):
        Coil((0, 0, 0), (0, 0, 1), 0.01, 100, current_limit=1.0, core_gain=0.5)
    with pytest.raises(ActuatorError, match="resistance"):
        Coil((0, 0, 0), (0, 0, 1), 0.01, 100, current_limit=1.0).power(1.0)


def test_core_gain_and_default_thickness():
    # core_gain is a documented plain multiplier; default thickness = layers x axial wire pitch.
    air = Coil((0, 0, 0), (0, 0, 1), 0.01, 100, 0.01, layers=4, current_limit=1.0)
    iron = Coil((0, 0, 0), (0, 0, 1), 0.01, 100, 0.01, layers=4, current_limit=1.0, core_gain=3.0)
    assert air.thickness == pytest.approx(4 * 0.01 / 25)
    p = [[0.003, 0.001, 0.02]]
    np.testing.assert_allclose(iron.field(p), 3.0 * air.field(p), rtol=1e-14)


# ------------------------------------------------------------------------------------------------
# Bead forces
# ------------------------------------------------------------------------------------------------

MED = water(293.15)
SOFT = Body("soft-5um", radius=2.5e-6, density=1800.0, susceptibility=1.0)
SAT = Body("sat-3um", radius=1.4e-6, density=1600.0, susceptibility=1.0, saturation_magnetization=1.5e4)
MAGNET = Body("magnet-200um", radius=100e-6, density=7500.0, moment=(2e-8, 1e-8, 0.0))


def field_with_dz_gradient(bz, dbz):
    """A valid (curl- and divergence-free) field: Bz and dBz/dz, dBx/dx = dBy/dy = -dBz/dz / 2."""
    B = np.array([[0.0, 0.0, bz]])
    G = np.diag([-dbz / 2, -dbz / 2, dbz])[None]
    return B, G


def test_soft_bead_force_checks_value():
    # Jackson §5.7 / Furlani 2001 (CHECKS.md): r = 0.5 um, B = 10 mT, d|B|/dz = 10 T/m,
    # chi_eff = 0.75 -> Fz = 3.1250e-14 N. chi_eff = 0.75 is intrinsic chi = 1 (3 chi / (3 + chi)).
    assert effective_susceptibility(1.0) == 0.75
    bead = Body("b", radius=0.5e-6, density=1500.0, susceptibility=1.0)
    B, G = field_with_dz_gradient(0.01, 10.0)
    F = bead_force(bead, B, G)[0]
    np.testing.assert_allclose(F, [0, 0, 3.1250e-14], rtol=1e-4, atol=1e-30)


def test_saturating_bead_force():
    # Saturated: F = m_sat grad|B| (CHECKS.md); below the switch the linear law; continuous at
    # |B| = mu0 M_sat / chi_eff.
    msat = 1.5e4
    bead = Body("s", radius=0.5e-6, density=1500.0, susceptibility=1.0, saturation_magnetization=msat)
    b_switch = mu_0 * msat / 0.75
    lin = Body("l", radius=0.5e-6, density=1500.0, susceptibility=1.0)
    B, G = field_with_dz_gradient(0.5 * b_switch, 10.0)
    np.testing.assert_allclose(bead_force(bead, B, G), bead_force(lin, B, G), rtol=1e-14)
    B, G = field_with_dz_gradient(3 * b_switch, 10.0)
    np.testing.assert_allclose(bead_force(bead, B, G)[0, 2], msat * bead.volume * 10.0, rtol=1e-14)
    below = bead_force(bead, *field_with_dz_gradient(b_switch * (1 - 1e-9), 10.0))[0, 2]
    above = bead_force(bead, *field_with_dz_gradient(b_switch * (1 + 1e-9), 10.0))[0, 2]
    assert abs(above - below) < 1e-8 * abs(below)


def test_fixed_moment_force_is_gradient_of_m_dot_b():
    # F = grad(m . B) (Jackson §5.7): vs central differences of m . B of a real loop field.
    m = np.array(MAGNET.moment)
    pts = np.array([[0.2, 0.1, 0.3], [-0.5, 0.4, 0.1], [0.05, -0.02, -0.6]])
    G = loop_field_gradient(pts, 1.0, current=2.0)
    F = bead_force(MAGNET, loop_field(pts, 1.0, current=2.0), G)
    h = 1e-6
    Fn = np.empty_like(F)
    for j in range(3):
        e = np.zeros(3)
        e[j] = h
        Fn[:, j] = (loop_field(pts + e, 1.0, current=2.0) @ m - loop_field(pts - e, 1.0, current=2.0) @ m) / (2 * h)
    np.testing.assert_allclose(F, Fn, rtol=1e-6, atol=1e-9 * np.abs(F).max())


def test_bead_model_selection_and_errors():
    assert bead_model(SOFT) == "linear" and bead_model(SAT) == "saturating" and bead_model(MAGNET) == "fixed"
    assert set(BEAD_MODELS) == {"fixed", "linear", "saturating"}
    plain = Body("glass", radius=2e-6, density=2500.0)
    with pytest.raises(ActuatorError, match="no magnetic properties"):
        bead_model(plain)
    both = Body("both", radius=2e-6, density=2500.0, moment=(1e-12, 0, 0), susceptibility=0.5)
    with pytest.raises(ActuatorError, match="both"):
        bead_model(both)


# ------------------------------------------------------------------------------------------------
# The actuator
# ------------------------------------------------------------------------------------------------

def ring(n=4, ring_radius=0.015, gap=0.002, radius=0.005, turns=250, length=0.008, layers=5, tilt=0.0, **kw):
    """A ring of coils under the dish floor (z = 0), realistic sizes (PHYSICS-NOTES.md ranges)."""
    coils = []
    for k in range(n):
        ang = 2 * np.pi * k / n
        axis = (-tilt * np.cos(ang), -tilt * np.sin(ang), 1.0)   # tilt > 0 leans them toward the centre
        coils.append(Coil((ring_radius * np.cos(ang), ring_radius * np.sin(ang), -gap - length / 2 - radius * tilt),
                          axis, radius, turns, length, layers=layers, current_limit=2.0, **kw))
    return coils


EXT = (-0.012, 0.012, -0.012, 0.012)


@pytest.fixture(scope="module")
def coils4():
    return ring(4)


@pytest.mark.parametrize("method", ["grid", "exact"])
@pytest.mark.parametrize("models,bodies", [
    ("fixed", [MAGNET]),
    ("linear", [SOFT]),
    ("saturating", [SAT]),
    (("fixed", "linear", "saturating"), [MAGNET, SOFT, SAT]),
])
def test_check_actuator_every_bead_model(coils4, method, models, bodies):
    # fieldplan.contract.testing.check_actuator: the actuator contract, for each bead model.
    arr = CoilArray(coils4, 0.0, bead_models=models, method=method, extent=EXT, primitives="singles")
    check_actuator(arr, bodies, MED, rng=1, n_points=10)
    assert ("affine_in_input" in arr.tags) == (models == "fixed")
    assert "zero_idle" in arr.tags


def test_check_actuator_with_bias(coils4):
    # A uniform bias (zero_idle still true) and a Helmholtz bias pair (not zero_idle: its own
    # gradient moves beads), for fixed (still affine) and soft beads.
    uni = CoilArray(coils4, 0.0, bead_models=("linear", "saturating"), bias=(0, 0, 5e-3), extent=EXT,
                    primitives="singles")
    check_actuator(uni, [SOFT, SAT], MED, rng=2, n_points=8)
    assert "zero_idle" in uni.tags
    pair = helmholtz_pair(0.04, 100, center=(0.002, 0.0, 0.001), current_limit=3.0)
    hb = CoilArray(coils4, 0.0, bead_models="fixed", bias=[(pair[0], 1.0), (pair[1], 1.0)], extent=EXT)
    check_actuator(hb, [MAGNET], MED, rng=3, n_points=8)
    assert hb.tags == {"affine_in_input"}
    # the Helmholtz bias field at the dish centre is close to (4/5)^(3/2) mu0 N I / R (textbook)
    b = hb.field([[0.002, 0.0]], np.zeros(4), height=0.001)[0]
    assert abs(b[2] / ((4 / 5) ** 1.5 * mu_0 * 100 / 0.04) - 1) < 0.02


def test_tilted_coils_grid_path():
    # Tilted coils use the (x, y) plane grid instead of the radial tables; contract and accuracy.
    arr = CoilArray(ring(4, tilt=0.4, layers=1, length=0.004), 0.0, bead_models="linear", extent=EXT,
                    primitives="singles", grid_rtol=1e-3)
    check_actuator(arr, [SOFT], MED, rng=4, n_points=8)
    err = arr.grid_error(SOFT.height)
    assert err["grid_nodes"] is not None and max(err["field"], err["gradient"]) <= 1e-3


def test_fixed_moment_superposition(coils4):
    # Fixed moment: F = grad(m . B) is linear in B, B linear in the currents (Biot-Savart), so
    # superposition is exact; with a uniform bias the force is unchanged (no gradient).
    rng = np.random.default_rng(0)
    xy = rng.uniform(-0.01, 0.01, (15, 2))
    for bias in (None, (0.0, 0.004, 0.01)):
        arr = CoilArray(coils4, 0.0, bead_models="fixed", bias=bias, extent=EXT)
        u1 = rng.uniform(-1, 1, 4)
        u2 = rng.uniform(-1, 1, 4)
        f12 = arr.force(MAGNET, xy, u1 + u2)
        f1, f2 = arr.force(MAGNET, xy, u1), arr.force(MAGNET, xy, u2)
        np.testing.assert_allclose(f12, f1 + f2, rtol=1e-12, atol=1e-12 * np.abs(f12).max())
        np.testing.assert_allclose(arr.force(MAGNET, xy, -u1), -f1, rtol=1e-13, atol=0)


def test_soft_force_quadratic(coils4):
    # Linear soft bead, no bias: F = V chi_eff/(2 mu0) grad|B|^2 is quadratic in the currents,
    # so doubling all currents quadruples the force (Jackson §5.7; Furlani 2001).
    arr = CoilArray(coils4, 0.0, bead_models="linear", extent=EXT)
    rng = np.random.default_rng(1)
    xy = rng.uniform(-0.01, 0.01, (15, 2))
    u = rng.uniform(-1, 1, 4)
    np.testing.assert_allclose(arr.force(SOFT, xy, 2 * u), 4 * arr.force(SOFT, xy, u), rtol=1e-12)
    v = arr.velocity(SOFT, MED, xy, u)
    np.testing.assert_allclose(arr.velocity(SOFT, MED, xy, -u), v, rtol=1e-12)


def test_velocity_is_force_over_wall_drag(coils4):
    # Velocity = in-plane force / (Stokes drag x exact wall factor) (fieldplan.world.physics).
    from fieldplan.world.physics import drag_coefficient, stokes_drag, wall_drag_parallel

    arr = CoilArray(coils4, 0.0, bead_models="linear", extent=EXT)
    xy = np.array([[0.004, -0.002], [0.0, 0.0]])
    u = np.array([1.5, 0.0, -0.5, 0.2])
    F = arr.force(SOFT, xy, u)
    v = arr.velocity(SOFT, MED, xy, u)
    drag = stokes_drag(SOFT.radius, MED.viscosity) * wall_drag_parallel(SOFT.radius, SOFT.height)
    assert drag == pytest.approx(drag_coefficient(SOFT, MED))
    np.testing.assert_allclose(v, F[:, :2] / drag, rtol=1e-14)


def test_realistic_speeds_and_floor_pull(coils4):
    # PHYSICS-NOTES.md (from memory): 1-100 um/s for 1-10 um soft beads, gradients 0.1-10 T/m.
    arr = CoilArray(coils4, 0.0, bead_models=("linear", "saturating"), extent=EXT)
    u = np.array([2.0, 0, 0, 0])
    xy = np.array([[0.008, 0.0], [0.0, 0.0], [0.012, 0.003]])
    speed = np.linalg.norm(arr.velocity(SOFT, MED, xy, u), axis=1)
    assert 1e-6 < speed.max() < 1e-3
    # Coils below the floor pull soft beads down onto it (|B|^2 grows toward the coil).
    assert np.all(arr.force(SOFT, xy, u)[:, 2] < 0)
    assert np.all(arr.lift_ratio(SOFT, MED, xy, u) < 0)
    # A coil above the dish lifts a bead under it when strong enough: ratio > 0 there.
    above = Coil((0.0, 0.0, 0.004), (0, 0, 1), 0.003, 300, 0.004, current_limit=3.0)
    arr2 = CoilArray([above], 0.0, bead_models="linear", extent=EXT)
    assert arr2.lift_ratio(SOFT, MED, [[0.0005, 0.0]], [3.0])[0] > 0


def test_grid_matches_exact(coils4):
    # The interpolation error stated by grid_error() holds against exact evaluation.
    grid = CoilArray(coils4, 0.0, bead_models="linear", extent=EXT, grid_rtol=1e-6)
    exact = CoilArray(coils4, 0.0, bead_models="linear", extent=EXT, method="exact")
    rng = np.random.default_rng(2)
    xy = np.vstack([rng.uniform(-0.012, 0.012, (200, 2)), [[0.02, 0.0]]])   # one point outside the extent
    Bg, Gg = grid.unit_fields(xy, SOFT.height)
    Be, Ge = exact.unit_fields(xy, SOFT.height)
    err = grid.grid_error(SOFT.height)
    assert max(err["field"], err["gradient"]) <= 1e-6
    assert err["radial_samples"] > 10 and err["grid_nodes"] is None
    bscale = np.linalg.norm(Be, axis=-1).max(axis=1)[:, None]
    gscale = np.linalg.norm(Ge, axis=(-2, -1)).max(axis=1)[:, None]
    assert (np.linalg.norm(Bg - Be, axis=-1) / bscale).max() <= 2e-6
    assert (np.linalg.norm(Gg - Ge, axis=(-2, -1)) / gscale).max() <= 2e-6
    np.testing.assert_array_equal(Bg[:, -1], Be[:, -1])   # outside: exact


def test_basis_modes(coils4):
    # linear basis for a fixed-moment array = velocity per ampere; timeshare for soft beads.
    rng = np.random.default_rng(4)
    xy = rng.uniform(-0.01, 0.01, (6, 2))
    fixed = CoilArray(coils4, 0.0, bead_models="fixed", extent=EXT)
    b = fixed.basis([MAGNET] * 6, MED, xy)
    assert b.mode == "linear" and b.fields.shape == (4, 6, 2)
    np.testing.assert_allclose(b.fields[2], fixed.velocity(MAGNET, MED, xy, [0, 0, 1.0, 0]), rtol=1e-12)
    soft = CoilArray(coils4, 0.0, bead_models=("linear", "saturating"), extent=EXT)
    b = soft.basis([SOFT, SAT] * 3, MED, xy)
    assert b.mode == "timeshare" and b.size == len(soft.primitives())
    with pytest.raises(ActuatorError, match="accepts only"):
        soft.basis([MAGNET] * 6, MED, xy)


def test_primitives_generated_and_given(coils4):
    soft = CoilArray(coils4, 0.0, bead_models="linear", extent=EXT)
    names = [p.name for p in soft.primitives()]
    # induced beads without bias: u and -u act alike, so 4 singles + 6 pairs x 2 relative signs
    assert len(names) == 4 + 6 * 2 and len(set(names)) == len(names)
    mixed = CoilArray(coils4, 0.0, extent=EXT)
    assert len(mixed.primitives()) == 8 + 6 * 4
    for p in mixed.primitives():
        mixed.check_input(p.values)
    assert {abs(v) for p in mixed.primitives() for v in p.values} == {0.0, 2.0}
    given = CoilArray(coils4, 0.0, bead_models="linear", extent=EXT,
                      primitives=[("north", (1.0, 0, 0, 0)), Primitive("pair", (0.5, 0.5, 0, 0))])
    assert [p.name for p in given.primitives()] == ["north", "pair"]
    with pytest.raises(ActuatorError, match="outside its bounds"):
        CoilArray(coils4, 0.0, extent=EXT, primitives=[("too-much", (5.0, 0, 0, 0))])
    with pytest.raises(ActuatorError, match="unique"):
        CoilArray(coils4, 0.0, extent=EXT, primitives=[("a", (1.0, 0, 0, 0)), ("a", (0, 1.0, 0, 0))])


def test_array_bad_input(coils4):
    arr = CoilArray(coils4, 0.0, extent=EXT)
    glass = Body("glass", radius=2e-6, density=2500.0)
    with pytest.raises(ActuatorError, match="no magnetic properties"):
        arr.velocity(glass, MED, [[0.0, 0.0]], np.zeros(4))
    with pytest.raises(ActuatorError, match="accepts only"):
        CoilArray(coils4, 0.0, bead_models="fixed", extent=EXT).velocity(SOFT, MED, [[0, 0]], np.zeros(4))
    with pytest.raises(ActuatorError, match="bead_models"):
        CoilArray(coils4, 0.0, bead_models="ferrofluid")
    with pytest.raises(ActuatorError, match="cuts through the winding of coil_1"):
        CoilArray(coils4, -0.005)
    with pytest.raises(ActuatorError, match="extent"):
        CoilArray(coils4, 0.0, extent=(0.01, -0.01, 0, 1))
    with pytest.raises(ActuatorError, match="bias"):
        CoilArray(coils4, 0.0, bias=[("not a coil", 1.0)])
    with pytest.raises(ActuatorError, match="at least one coil"):
        CoilArray([], 0.0)
    with pytest.raises(ActuatorError, match="outside its bounds"):
        arr.velocity(SOFT, MED, [[0.0, 0.0]], [3.0, 0, 0, 0])


def test_channels_and_default_extent(coils4):
    arr = CoilArray(coils4, 0.0)
    assert [c.name for c in arr.channels] == ["coil_1", "coil_2", "coil_3", "coil_4"]
    assert all(c.unit == "A" and c.lower == -2.0 and c.upper == 2.0 for c in arr.channels)
    x0, x1, y0, y1 = arr.extent
    assert x1 == pytest.approx(0.015 + coils4[0].outer_radius) and x0 == pytest.approx(-x1)


def test_pickle_drops_cache(coils4):
    arr = CoilArray(coils4, 0.0, bead_models="linear", extent=EXT)
    xy = np.array([[0.001, 0.002]])
    v = arr.velocity(SOFT, MED, xy, [1.0, 0, 0, 0])
    clone = pickle.loads(pickle.dumps(arr))
    assert clone._grids == {}
    np.testing.assert_allclose(clone.velocity(SOFT, MED, xy, [1.0, 0, 0, 0]), v, rtol=1e-14)


# ------------------------------------------------------------------------------------------------
# Heat
# ------------------------------------------------------------------------------------------------

def test_power_and_thermal_limits():
    coils = ring(2, resistance=3.0, rms_current=1.0, thermal_time_constant=10.0)
    arr = CoilArray(coils, 0.0, extent=EXT)
    np.testing.assert_allclose(arr.power([2.0, -1.0]), [12.0, 3.0])      # I^2 R (Joule heating)
    lim = arr.rms_limits()
    assert set(lim) == {"coil_1", "coil_2"}
    assert lim["coil_1"] == ChannelLimit(lower=-2.0, upper=2.0, rms=1.0, rms_window=10.0)
    hw = arr.hardware_limits(time_step=0.01)
    assert hw.get("coil_2").rms == 1.0
    # 2 A for 2 s of every 10 s: windowed RMS = 2 sqrt(0.2) = 0.894 A, within 1 A
    ok = Schedule(arr.channels, [0.0, 2.0, 10.0, 12.0], [2.0, 8.0, 2.0, 8.0],
                  [[2.0, 0.0], [0.0, 0.0], [2.0, 0.0], [0.0, 0.0]])
    arr.check_thermal(ok)
    rep = arr.thermal_report(ok)
    assert rep[0]["rms_current"] == pytest.approx(2 * math.sqrt(0.2))
    assert rep[0]["energy"] == pytest.approx(3.0 * 4.0 * 4.0)          # R * integral I^2 dt, J
    assert rep[0]["peak_power"] == pytest.approx(12.0)
    assert rep[0]["ok"] and rep[1]["ok"]
    # 2 A held for 5 s inside a 10 s window: RMS 1.41 A > 1 A
    hot = Schedule(arr.channels, [0.0, 5.0], [5.0, 15.0], [[0.0, 2.0], [0.0, 0.0]])
    with pytest.raises(LimitError, match="coil_2") as exc:
        arr.check_thermal(hot)
    assert exc.value.limit == "rms" and exc.value.channel == "coil_2"
    assert hot.violations(hw) != [] and ok.violations(hw) == []


# ------------------------------------------------------------------------------------------------
# Plot
# ------------------------------------------------------------------------------------------------

def test_plot_field(coils4):
    arr = CoilArray(coils4, 0.0, bead_models="linear", extent=EXT)
    fig = plot_field(arr, SOFT, MED, [2.0, 0, -1.0, 0], resolution=21, arrows=7)
    axes = fig.axes
    assert len(axes) == 4                      # two maps + two colour bars
    labels = {ax.get_ylabel() for ax in axes} | {ax.get_xlabel() for ax in axes}
    assert {"x (mm)", "y (mm)", "|B| (mT)", "bead speed (µm/s)"} <= labels
    import matplotlib.pyplot as plt
    plt.close(fig)


def test_built_from_plain_data():
    # Scenario files give coils and bias coils as mappings; "module:Class" loading (fieldplan.contract.registry).
    from fieldplan.contract.registry import load_actuator

    spec = dict(center=(0.01, 0.0, -0.006), axis=(0, 0, 1), radius=0.005, turns=200, length=0.008,
                layers=4, current_limit=2.0)
    bias = [{"coil": dict(spec, center=(0.0, 0.0, 0.02), radius=0.03, length=0.0, layers=1), "current": 0.5}]
    arr = load_actuator("fieldplan.actuators.magnetic:CoilArray", coils=[spec, dict(spec, center=(-0.01, 0.0, -0.006))],
                        plane_height=0.0, bead_models="linear", bias=bias)
    ref = CoilArray([Coil(**spec), Coil(**dict(spec, center=(-0.01, 0.0, -0.006)))], 0.0, bead_models="linear",
                    bias=[(Coil(**bias[0]["coil"]), 0.5)])
    xy = [[0.002, 0.001]]
    np.testing.assert_array_equal(arr.velocity(SOFT, MED, xy, [1.0, 0.0]), ref.velocity(SOFT, MED, xy, [1.0, 0.0]))
    assert "zero_idle" not in arr.tags
    with pytest.raises(ActuatorError, match="bias"):
        CoilArray([spec], 0.0, bias=[{"coil": spec}])
    with pytest.raises(ActuatorError, match="cannot build a Coil"):
        CoilArray([dict(spec, colour="red")], 0.0)


def test_to_config_round_trip(coils4):
    # Scenario files write actuators through to_config(); CoilArray(**cfg) must rebuild the same model.
    import yaml

    pair = helmholtz_pair(0.04, 100, current_limit=3.0)
    for kw in (dict(bias=[(pair[0], 0.7), (pair[1], 0.7)], primitives="singles"),
               dict(bias=(0.0, 0.0, 0.004), primitives=[("a", (1.0, 0, 0, 0)), ("b", (0, -2.0, 0, 0))]),
               dict()):
        arr = CoilArray(coils4, 0.0, bead_models=("linear", "saturating"), extent=EXT, **kw)
        cfg = yaml.safe_load(yaml.safe_dump(arr.to_config()))
        back = CoilArray(**cfg)
        xy = [[0.003, -0.004], [0.0, 0.008]]
        u = [1.0, -0.5, 0.0, 2.0]
        np.testing.assert_array_equal(back.velocity(SAT, MED, xy, u), arr.velocity(SAT, MED, xy, u))
        assert [p.name for p in back.primitives()] == [p.name for p in arr.primitives()]
        assert back.tags == arr.tags


def test_j_function_both_regimes():
    # J(m) = int_0^{pi/2} sin^4 t (1 - m sin^2 t)^(-3/2) dt (the module's cancellation-free kernel)
    # against direct quadrature of that integral (scipy.integrate.quad) and against its
    # hypergeometric form (3 pi/16) 2F1(3/2, 5/2; 3; m) (Euler's integral for 2F1 [pub], here
    # evaluated by scipy.special.hyp2f1), on both sides of the series / closed-form switch.
    from scipy.integrate import quad
    from scipy.special import hyp2f1

    from fieldplan.actuators.magnetic import _M_SWITCH, _j_function

    m = np.array([0.0, 1e-8, 0.01, 0.1, 0.2, _M_SWITCH * (1 - 1e-12), _M_SWITCH, 0.3, 0.6, 0.9, 0.99])
    J, dJ, *_ = _j_function(m, 1 - m, True)
    hyp = 3 * np.pi / 16 * hyp2f1(1.5, 2.5, 3.0, m)
    dhyp = 3 * np.pi / 16 * (1.5 * 2.5 / 3.0) * hyp2f1(2.5, 3.5, 4.0, m)
    np.testing.assert_allclose(J, hyp, rtol=1e-13)
    np.testing.assert_allclose(dJ, dhyp, rtol=1e-12)
    for mi, Ji in zip(m[:8], J[:8]):
        ref = quad(lambda t: np.sin(t) ** 4 / (1 - mi * np.sin(t) ** 2) ** 1.5, 0, np.pi / 2, epsabs=0, epsrel=1e-13)[0]
        assert abs(Ji / ref - 1) < 1e-12

"""Plate modes (actuators.plate_modes): Kirchhoff plates by Rayleigh–Ritz against published and independent solutions.

Sources are named beside each check (see shared CHECKS.md):
Leissa = A. W. Leissa, Vibration of Plates, NASA SP-160 (1969).
"""

import numpy as np
import pytest
from scipy.optimize import brentq

from fieldplan.actuators.plate_modes import flexural_rigidity, parse_edges, plate_modes

AL = dict(youngs_modulus=69e9, poisson_ratio=0.3, density=2700.0)
A = 0.2          # m, side of the square plates
H = 1e-3         # m


def modes(edges, n, a=A, b=A, supports=(), **kw):
    return plate_modes(a, b, H, AL["youngs_modulus"], AL["poisson_ratio"], AL["density"], edges,
                       supports, n, **kw)


def lam2_scale(a=A):
    """omega -> lambda^2 = omega a^2 sqrt(rho h / D)."""
    d = flexural_rigidity(H, AL["youngs_modulus"], AL["poisson_ratio"])
    return a**2 * np.sqrt(AL["density"] * H / d)


# ------------------------------------------------------------------------------------------
# plate modes
# ------------------------------------------------------------------------------------------
def test_simply_supported_exact_frequencies_and_shapes():
    """Leissa [pub]: omega_mn = pi^2 [(m/a)^2 + (n/b)^2] sqrt(D / rho h), shape sin sin;
    square lambda^2(1,1) = 2 pi^2, (1,2) = 5 pi^2, (2,2) = 8 pi^2."""
    sq = modes("SSSS", 4)
    assert sq.method == "exact"
    np.testing.assert_allclose(sq.lambda2, np.pi**2 * np.array([2, 5, 5, 8]), rtol=1e-12)
    a, b = 0.3, 0.2
    rect = modes("simply_supported", 6, a=a, b=b)
    d = flexural_rigidity(H, AL["youngs_modulus"], AL["poisson_ratio"])
    mn = [(m, n) for m in range(1, 8) for n in range(1, 8)]
    want = sorted(np.pi**2 * ((m / a) ** 2 + (n / b) ** 2) * np.sqrt(d / (AL["density"] * H)) for m, n in mn)[:6]
    np.testing.assert_allclose(rect.omega, want, rtol=1e-12)
    # Shape of mode (1,1) and of (2,1), the second mode of this rectangle, mass-normalised.
    rng = np.random.default_rng(1)
    xy = rng.uniform([-a / 2, -b / 2], [a / 2, b / 2], (50, 2))
    u, v = xy[:, 0] + a / 2, xy[:, 1] + b / 2
    amp = 2.0 / np.sqrt(AL["density"] * H * a * b)
    for k, (m, n) in enumerate([(1, 1), (2, 1)]):
        exact = amp * np.sin(m * np.pi * u / a) * np.sin(n * np.pi * v / b)
        np.testing.assert_allclose(rect.shape(xy)[:, k], exact, rtol=1e-10, atol=1e-12 * amp)


def test_ritz_reproduces_the_exact_simply_supported_modes():
    """Leissa [pub] exact SS frequencies; the Ritz path (method='ritz') must find them too."""
    a, b = 0.3, 0.2
    exact = modes("SSSS", 8, a=a, b=b)
    ritz = modes("SSSS", 8, a=a, b=b, method="ritz", tol=1e-8)
    assert ritz.method == "ritz"
    np.testing.assert_allclose(ritz.omega, exact.omega, rtol=1e-8)
    xy = np.random.default_rng(2).uniform([-a / 2, -b / 2], [a / 2, b / 2], (40, 2))
    for k in range(4):  # non-degenerate modes of this rectangle: equal up to the sign convention
        e, r = exact.shape(xy)[:, k], ritz.shape(xy)[:, k]
        sign = np.sign(e @ r)
        np.testing.assert_allclose(sign * r, e, atol=1e-6 * np.max(np.abs(e)))


def test_square_free_plate_published_frequencies():
    """CHECKS.md, square all free, nu = 0.3 [pub, converged values; Leissa 1969 gives 13.468]:
    three rigid-body zeros, then 13.468, 19.596, 24.270, 34.801 (x2), 61.093 (x2), 63.686."""
    m = modes("free", 11)
    assert m.n_rigid == 3 and np.all(m.lambda2[:3] == 0)
    want = [13.468, 19.596, 24.270, 34.801, 34.801, 61.093, 61.093, 63.686]
    np.testing.assert_allclose(m.lambda2[3:], want, rtol=1e-3)
    assert m.converged and m.achieved <= 1e-4


def test_square_cantilever_plate():
    """Square plate clamped on one edge, nu = 0.3 (from memory: converged Ritz values 3.4711,
    8.5066, 21.285, 27.199; Leissa 1969 tabulates older, slightly higher approximations)."""
    m = modes("CFFF", 4)
    np.testing.assert_allclose(m.lambda2, [3.4711, 8.5066, 21.285, 27.199], rtol=1e-3)


def test_square_clamped_plate_fundamental():
    """Leissa 1969 [pub]: square, all edges clamped, lambda_1^2 = 35.985 (converged)."""
    m = modes("clamped", 3)
    assert m.n_rigid == 0
    np.testing.assert_allclose(m.lambda2[0], 35.985, rtol=1e-3)


def test_ritz_frequencies_fall_monotonically_as_the_basis_grows():
    """Rayleigh-Ritz [pub, e.g. Leissa 1969 ch. 1]: nested trial spaces give upper bounds that
    decrease monotonically to the eigenvalue. Clamped square -> 35.985 (Leissa 1969)."""
    lam = [modes("CCCC", 1, degree=d).lambda2[0] for d in (4, 5, 6, 8, 10, 12)]
    assert np.all(np.diff(lam) <= 1e-9 * lam[0]), lam
    assert lam[0] > lam[-1] * (1 + 3e-4)        # the one-term basis (x^2-1)^2(y^2-1)^2 is off ...
    np.testing.assert_allclose(lam[-1], 35.985, rtol=1e-4)   # ... the fine one converged
    # The same with a pinned support (singular enrichment): fast monotone convergence.
    pin = [modes("free", 4, supports=[(0.0, 0.0)], degree=d).lambda2[2] for d in (4, 6, 8, 12)]
    assert np.all(np.diff(pin) <= 1e-9 * pin[0]), pin
    ref = modes("free", 4, supports=[(0.0, 0.0)], tol=1e-7).lambda2[2]
    assert abs(pin[-1] / ref - 1) < 1e-5


def test_stated_tolerance_is_met():
    """The estimated error is honest: a much finer basis moves the frequencies by less than tol
    (common practice, no source: a convergence study)."""
    tol = 1e-6
    m = modes("CSFS", 12, a=0.25, tol=tol)   # rectangle with mixed edges, no clamped-free corner
    fine = modes("CSFS", 12, a=0.25, degree=m.degree + 12)
    assert m.converged and m.achieved <= tol
    assert np.max(np.abs(m.omega / fine.omega - 1)) < tol


def _gauss_grid(x0, x1, y0, y1, n):
    t, w = np.polynomial.legendre.leggauss(n)
    x = x0 + (t + 1) * (x1 - x0) / 2
    y = y0 + (t + 1) * (y1 - y0) / 2
    X, Y = np.meshgrid(x, y, indexing="ij")
    W = np.outer(w * (x1 - x0) / 2, w * (y1 - y0) / 2)
    return np.column_stack([X.ravel(), Y.ravel()]), W.ravel()


@pytest.mark.parametrize("case", ["free", "SCSC", "pinned", "exact"])
def test_modes_are_mass_orthonormal(case):
    """Definition of mass normalisation: integral(rho h phi_m phi_n) dA = delta_mn, checked by an
    independent Gauss quadrature of shape() over the plate (split at the centre, where a pin
    puts its r^2 ln r singularity; derived)."""
    a, b = (0.3, 0.2) if case == "SCSC" else (A, A)
    m = {"free": lambda: modes("free", 12),
         "SCSC": lambda: modes("SCSC", 12, a=a, b=b),
         "pinned": lambda: modes("free", 12, supports=[(0.0, 0.0)]),
         "exact": lambda: modes("SSSS", 12)}[case]()
    pts, wts = [], []
    for x0, x1 in ((-a / 2, 0), (0, a / 2)):
        for y0, y1 in ((-b / 2, 0), (0, b / 2)):
            p, w = _gauss_grid(x0, x1, y0, y1, 40)
            pts.append(p)
            wts.append(w)
    phi = m.shape(np.vstack(pts))
    gram = AL["density"] * H * (phi * np.concatenate(wts)[:, None]).T @ phi
    np.testing.assert_allclose(gram, np.eye(m.n_modes), atol=2e-7)


def _levy_lambda2(a, b, y_edges, count, m_max=6):
    """Independent method: Levy's closed form for a plate simply supported on x = 0, a.

    w = sin(m pi x / a) Y(y); Y'''' - 2 alpha^2 Y'' + (alpha^4 - k^4) Y = 0 with alpha = m pi / a
    and k^4 = rho h omega^2 / D (Leissa 1969, ch. 4). For clamped or simply supported y-edges
    k > alpha, so Y = c1 e^{b1 (y - b)} + c2 e^{-b1 y} + c3 cos(b2 y) + c4 sin(b2 y) with
    b1 = sqrt(k^2 + alpha^2), b2 = sqrt(k^2 - alpha^2). The boundary rows (clamped: Y = Y' = 0;
    simply supported: Y = Y'' = 0, since Y'' - nu alpha^2 Y = 0 with Y = 0) give a 4 x 4
    determinant whose roots in k are found with brentq. Returns lambda^2 = k^2 a^2 (with side a).
    """
    def rows(y, code, k, alpha):
        b1, b2 = np.sqrt(k * k + alpha * alpha), np.sqrt(k * k - alpha * alpha)
        e1, e2 = np.exp(b1 * (y - b)), np.exp(-b1 * y)
        c, s = np.cos(b2 * y), np.sin(b2 * y)
        val = [e1, e2, c, s]
        d1 = [b1 * e1, -b1 * e2, -b2 * s, b2 * c]
        d2 = [b1 * b1 * e1, b1 * b1 * e2, -b2 * b2 * c, -b2 * b2 * s]
        return [val, d1] if code == "C" else [val, d2]

    def det(k, alpha):
        mat = np.array(rows(0.0, y_edges[0], k, alpha) + rows(b, y_edges[1], k, alpha))
        return np.linalg.det(mat / np.max(np.abs(mat), axis=1, keepdims=True))

    out = []
    for m in range(1, m_max + 1):
        alpha = m * np.pi / a
        ks = np.linspace(alpha * (1 + 1e-6), alpha + 12 * np.pi / b, 6000)
        vals = np.array([det(k, alpha) for k in ks])
        for i in np.flatnonzero(np.sign(vals[:-1]) * np.sign(vals[1:]) < 0):
            out.append(brentq(det, ks[i], ks[i + 1], args=(alpha,), xtol=1e-14) ** 2 * a * a)
    return np.sort(out)[:count]


@pytest.mark.parametrize("edges, a, b", [("SCSC", 0.3, 0.2), ("SSSC", 0.14, 0.2)])
def test_rectangle_with_mixed_edges_matches_levy_solution(edges, a, b):
    """Independent method written here: the Levy closed-form characteristic equation solved with
    brentq (Leissa 1969, ch. 4), for SS-C-SS-C at a/b = 1.5 and SS-SS-SS-C at a/b = 0.7."""
    codes = parse_edges(edges)
    ritz = modes(edges, 8, a=a, b=b, tol=1e-7)
    levy = _levy_lambda2(a, b, (codes[1], codes[3]), 8)
    np.testing.assert_allclose(ritz.lambda2, levy, rtol=1e-6)


def test_pinned_support_matches_receptance_zeros_of_the_free_plate():
    """Independent method [derived from modal superposition]: a plate pinned at c has its
    eigenfrequencies at the zeros of the free plate's driving-point receptance
    sum_m phi_m(c)^2 / (omega_m^2 - omega^2). The truncated sum converges as 1/M; Richardson
    extrapolation from M = 60 and 120 free modes leaves ~1e-3 (a polynomial-only Ritz basis at
    degree 10 is 1 % off, so the check separates the two)."""
    pin = modes("free", 12, supports=[(0.0, 0.0)], tol=1e-7)
    assert pin.n_rigid == 2                 # a pin leaves the two rocking motions free
    c = np.zeros((1, 2))
    zeros = {}
    for n in (60, 120):
        free = modes("free", n)
        phi, om = free.shape(c)[0], free.omega
        rig = om == 0
        r0 = np.sum(phi[rig] ** 2)
        keep = ~rig & (np.abs(phi) > 1e-6 * np.max(np.abs(phi)))
        ph, po = phi[keep], om[keep]

        def receptance(w):
            return -r0 / w**2 + np.sum(ph**2 / (po**2 - w**2))

        edges = np.concatenate([[po[0] * 1e-3], po[:2]])
        zeros[n] = np.array([brentq(receptance, lo * (1 + 1e-9), hi * (1 - 1e-9))
                             for lo, hi in zip(edges[:-1], edges[1:])])
    want = (2 * zeros[120] - zeros[60]) * lam2_scale()
    # The two lowest modes the pin changes (those not vanishing at c) are the nearest ones.
    got = [pin.lambda2[np.argmin(np.abs(pin.lambda2 - w))] for w in want]
    np.testing.assert_allclose(got, want, rtol=3e-3)


def test_participation_of_simply_supported_modes():
    """Derived from the exact SS modes (Leissa 1969): Gamma_11 = integral(rho h phi_11) dA
    = 8 sqrt(rho h a b) / pi^2; modes with an even index have Gamma = 0."""
    m = modes("SSSS", 4, a=0.3, b=0.2)
    gam = m.participation()
    np.testing.assert_allclose(gam[0], 8 * np.sqrt(AL["density"] * H * 0.3 * 0.2) / np.pi**2, rtol=1e-12)
    assert abs(gam[1]) < 1e-12 * abs(gam[0])          # mode (2,1)


def test_mode_gradients_match_finite_differences():
    """Derivative check (common practice, no source): gradient() vs central differences."""
    m = modes("free", 8, supports=[(0.03, -0.02)])
    xy = np.random.default_rng(3).uniform(-0.09, 0.09, (20, 2))
    h = 1e-6
    fd = np.stack([(m.shape(xy + [h, 0]) - m.shape(xy - [h, 0])) / (2 * h),
                   (m.shape(xy + [0, h]) - m.shape(xy - [0, h])) / (2 * h)], axis=-1)
    np.testing.assert_allclose(m.gradient(xy), fd, rtol=1e-5, atol=1e-6 * np.max(np.abs(fd)))


# ------------------------------------------------------------------------------------------
# forced response
# ------------------------------------------------------------------------------------------

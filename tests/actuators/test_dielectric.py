"""Tests of actuators/dielectric.py and actuators/electrostatics.py (planar electrode array, DEP).

Every physics check names its source (see ../shared/CHECKS.md): [pub] published formula or table,
[derived] closed form derived from a published equation, [memory] recalled, not re-verified.
"""

import pickle
import warnings

import numpy as np
import pytest
from scipy import integrate, ndimage
from scipy.constants import epsilon_0
from shapely.geometry import Polygon, box

from fieldplan.actuators import electrostatics as es
from fieldplan.actuators.dielectric import (
    DielectrophoresisWarning,
    ElectrodeArray,
    ElectrolysisWarning,
    FieldLimitWarning,
    JouleHeatingWarning,
    ResolutionWarning,
    clausius_mossotti,
    complex_permittivity,
    crossover_frequencies,
    dep_force,
    joule_heating_estimate,
    plot_clausius_mossotti,
    plot_field_magnitude,
    plot_velocity_fields,
)
from fieldplan.actuators.electrostatics import (
    ElectrodeLayout,
    FloorSolver,
    Grid,
    SplineMaps,
    UnitResponses,
    half_space_fields,
    interdigitated,
    pad_array,
    quadrupole,
)
from fieldplan import Actuator, ActuatorError, Body, Medium, Shell, water
from fieldplan.contract.testing import check_actuator
from fieldplan.world.physics import drag_coefficient

# Test particles. Cell parameters are generic literature values for a mammalian cell (from memory):
# R 5 um, membrane 7 nm with eps 10 and sigma 1e-7 S/m, cytoplasm eps 60 and 0.5 S/m.
CELL = Body("cell", radius=5e-6, density=1070.0, shell=Shell(7e-9, 10.0, 1e-7, 60.0, 0.5))
BEAD = Body("bead", radius=3e-6, density=1050.0, permittivity=2.55, surface_conductance=1e-9)
BIG_BEAD = Body("bead-8um", radius=4e-6, density=1050.0, permittivity=2.55, surface_conductance=1e-9)
BUFFER = water(conductivity=0.01)          # a low-conductivity DEP buffer, 10 mS/m


def _benign():
    """Context that turns any DEP warning into an error (for operating points that must be quiet)."""
    cm = warnings.catch_warnings()
    cm.__enter__()
    warnings.simplefilter("error", DielectrophoresisWarning)
    return cm


@pytest.fixture(scope="module")
def small_array():
    return ElectrodeArray(pad_array(2, 2, 50e-6, 20e-6), [1e5, 1e6], voltage_limit=2.0, grid_points=128)


# ---------------------------------------------------------------------------------------------
# Clausius-Mossotti
# ---------------------------------------------------------------------------------------------
def test_re_k_limits():
    """Re K in [-0.5, 1], reaching 1 (perfect conductor) and -0.5 (insulator in a conductor).

    [pub] Clausius-Mossotti K = (eps_p* - eps_m*)/(eps_p* + 2 eps_m*), Re K in [-0.5, 1]
    (Jones 1995; Morgan & Green 2003).
    """
    med = Medium("salt", relative_permittivity=78.0, conductivity=1e-3)
    metal = Body("metal", radius=1e-6, density=8000.0, permittivity=2.0, conductivity=1e7)
    plastic = Body("plastic", radius=1e-6, density=1050.0, permittivity=2.55, conductivity=0.0)
    salty = Medium("salty", relative_permittivity=78.0, conductivity=1.0)
    assert clausius_mossotti(1e3, metal, med).real == pytest.approx(1.0, abs=1e-9)
    assert clausius_mossotti(1e3, plastic, salty).real == pytest.approx(-0.5, abs=1e-6)
    # high-frequency limit is the permittivity contrast alone
    assert clausius_mossotti(1e13, plastic, med).real == pytest.approx((2.55 - 78) / (2.55 + 156), rel=1e-6)
    rng = np.random.default_rng(5)
    f = np.logspace(2, 10, 200)
    for _ in range(40):
        p = Body("p", radius=rng.uniform(0.5e-6, 10e-6), density=1000.0, permittivity=rng.uniform(1, 120),
                 conductivity=10 ** rng.uniform(-6, 1), surface_conductance=10 ** rng.uniform(-11, -8))
        m = Medium("m", relative_permittivity=rng.uniform(1, 90), conductivity=10 ** rng.uniform(-5, 0))
        rk = clausius_mossotti(f, p, m).real
        assert np.all(rk >= -0.5 - 1e-12) and np.all(rk <= 1 + 1e-12)
    rk = clausius_mossotti(f, CELL, BUFFER).real
    assert np.all(rk >= -0.5 - 1e-12) and np.all(rk <= 1 + 1e-12)


def test_bead_crossover_frequency():
    """Latex bead r = 0.5 um, eps 2.55, K_s = 1 nS, in eps 78, 1 mS/m: crossover 697.26 kHz.

    [pub] crossover f = (1/2pi) sqrt[(sp - sm)(sp + 2 sm)/((em - ep)(ep + 2 em))], sp = 2 K_s / r
    (CHECKS.md, Clausius-Mossotti row; Morgan & Green 2003).
    """
    bead = Body("latex", radius=0.5e-6, density=1050.0, permittivity=2.55, surface_conductance=1e-9)
    med = Medium("buffer", relative_permittivity=78.0, conductivity=1e-3)
    fc = crossover_frequencies(bead, med, 1e3, 1e9)
    assert fc.shape == (1,)
    assert fc[0] == pytest.approx(697.26e3, abs=0.006e3)
    sp, sm, ep, em = 4e-3, 1e-3, 2.55 * epsilon_0, 78 * epsilon_0
    closed = np.sqrt((sp - sm) * (sp + 2 * sm) / ((em - ep) * (ep + 2 * em))) / (2 * np.pi)
    assert fc[0] == pytest.approx(closed, rel=1e-9)
    # pDEP below, nDEP above
    assert clausius_mossotti(0.5 * fc[0], bead, med).real > 0 > clausius_mossotti(2 * fc[0], bead, med).real


def test_single_shell_self_check():
    """Membrane equal to interior returns the interior permittivity.

    [pub] single-shell model, Irimajiri, Hanai & Inouye, J. Theor. Biol. 78 (1979): the CHECKS.md self-check.
    """
    f = np.logspace(3, 9, 13)
    same = Body("same", radius=5e-6, density=1000.0, shell=Shell(7e-9, 60.0, 0.5, 60.0, 0.5))
    want = 60.0 * epsilon_0 - 1j * 0.5 / (2 * np.pi * f)
    np.testing.assert_allclose(complex_permittivity(f, same), want, rtol=1e-12)
    homog = Body("homog", radius=5e-6, density=1000.0, permittivity=60.0, conductivity=0.5)
    np.testing.assert_allclose(clausius_mossotti(f, same, BUFFER), clausius_mossotti(f, homog, BUFFER), rtol=1e-12)


def test_generic_cell_crossover_behaviour():
    """A cell in low-conductivity medium: nDEP at low frequency, pDEP at mid frequency.

    [pub] single-shell model (Irimajiri et al. 1979) with generic cell parameters [memory]. The
    first crossover is compared, loosely, with the membrane-capacitance approximation
    f_x1 ~ sqrt(2) sigma_m / (2 pi R C_mem), C_mem = eps_mem / d [memory, approximate formula].
    """
    assert clausius_mossotti(1e3, CELL, BUFFER).real < -0.3
    assert clausius_mossotti(1e6, CELL, BUFFER).real > 0.5
    fc = crossover_frequencies(CELL, BUFFER, 1e3, 1e10)
    assert len(fc) == 2 and 1e3 < fc[0] < 1e6 < fc[1]
    c_mem = 10.0 * epsilon_0 / 7e-9
    assert fc[0] == pytest.approx(np.sqrt(2) * BUFFER.conductivity / (2 * np.pi * CELL.radius * c_mem), rel=0.1)
    # the first crossover rises with the medium conductivity (same approximation, [memory])
    fc2 = crossover_frequencies(CELL, water(conductivity=0.03), 1e3, 1e10)
    assert fc2[0] > 2 * fc[0]


def test_force_magnitude_case():
    """r = 5 um, eps_m = 78 eps0, Re K = 1, grad|E_rms|^2 = 1e13 V^2/m^3 -> 5.42417e-12 N.

    [pub] F = 2 pi eps_m r^3 Re[K] grad|E_rms|^2 (Jones 1995; Morgan & Green 2003), CHECKS.md value.
    """
    f = dep_force(5e-6, Medium(relative_permittivity=78.0), 1.0, np.array([1e13, 0.0]))
    assert f[0] == pytest.approx(5.42417e-12, rel=1e-5)
    assert f[1] == 0.0


def test_actuator_force_equals_dep_law_on_its_own_field(small_array):
    """Actuator force = 2 pi eps r^3 Re K grad|E_rms|^2 with grad taken by finite differences of |E_rms|^2.

    [pub] DEP force law as above; the finite difference of the |E_rms| map is an independent route
    to the gradient the actuator assembles by the product rule from spectral Hessians.
    """
    arr = small_array
    u = np.array(arr.primitives()[5].values)        # a neighbour pair in antiphase at 100 kHz
    maps = arr.field_maps(u, CELL.height)
    e2 = maps["e_rms"] ** 2

    def d4(a, axis, h):          # fourth-order central difference
        r = np.roll
        return (-r(a, -2, axis) + 8 * r(a, -1, axis) - 8 * r(a, 1, axis) + r(a, 2, axis)) / (12 * h)

    gx, gy = d4(e2, 1, arr.grid.dx), d4(e2, 0, arr.grid.dy)
    j = np.arange(20, arr.grid.ny - 20, 11)
    i = np.arange(20, arr.grid.nx - 20, 13)
    J, I = np.meshgrid(j, i, indexing="ij")
    xy = np.column_stack([arr.grid.x[I.ravel()], arr.grid.y[J.ravel()]])
    F = arr.force(CELL, BUFFER, xy, u)
    re_k = clausius_mossotti(u[-1], CELL, BUFFER).real
    want = dep_force(CELL.radius, BUFFER, re_k, np.column_stack([gx[J, I].ravel(), gy[J, I].ravel()]))
    scale = np.max(np.abs(want))
    np.testing.assert_allclose(F, want, atol=1e-2 * scale)
    assert np.max(np.abs(F)) > 0.1 * scale


# ---------------------------------------------------------------------------------------------
# Half-space solution
# ---------------------------------------------------------------------------------------------
def test_fft_half_space_cosine_exact():
    """phi0 = cos(kx x) cos(ky y) -> phi = phi0 exp(-|k| z) exactly, with all derivatives.

    [pub] textbook half-space Fourier solution phi_hat(k, z) = phi_hat_0(k) exp(-|k| z) (CHECKS.md).
    """
    nx, ny, dx, dy = 64, 32, 2e-6, 3e-6
    kx, ky = 2 * np.pi * 3 / (nx * dx), 2 * np.pi * 2 / (ny * dy)
    k = np.hypot(kx, ky)
    x, y = np.arange(nx) * dx, np.arange(ny) * dy
    X, Y = np.meshgrid(x, y)
    cx, sx, cy, sy = np.cos(kx * X), np.sin(kx * X), np.cos(ky * Y), np.sin(ky * Y)
    z = 7e-6
    out = half_space_fields(cx * cy, (dx, dy), z, pad=0, potential=True)
    d = np.exp(-k * z)
    np.testing.assert_allclose(out.potential, cx * cy * d, atol=1e-12)
    want_grad = [-kx * sx * cy * d, -ky * cx * sy * d, -k * cx * cy * d]
    want_hess = [-kx**2 * cx * cy * d, kx * ky * sx * sy * d, kx * k * sx * cy * d, -ky**2 * cx * cy * d,
                 ky * k * cx * sy * d]
    for c in range(3):
        np.testing.assert_allclose(out.gradient[c], want_grad[c], atol=1e-12 * k)
    for c in range(5):
        np.testing.assert_allclose(out.hessian[c], want_hess[c], atol=1e-12 * k * k)
    # Laplace's equation: phi_xx + phi_yy + phi_zz = 0 with phi_zz = k^2 phi
    np.testing.assert_allclose(out.hessian[0] + out.hessian[3] + k**2 * out.potential, 0, atol=1e-12 * k * k)


def test_half_planes_zero_gap():
    """Coplanar half-planes at +-V/2 with zero gap: |E| = V/(pi r) away from the junction.

    [pub] phi = V/2 - V theta/pi, |E| = V/(pi r) (CHECKS.md). Sampled as a periodic square wave of
    period L; the periodic correction (k r)^2 / 6 stays below 0.4 % for r <= L/40.
    """
    n, dx, V = 1024, 1e-6, 2.0
    x = (np.arange(n) + 0.5) * dx - n * dx / 2
    phi0 = np.tile(np.where(x > 0, -V / 2, V / 2), (4, 1))
    worst = 0.0
    for r_cells in (8, 12, 16, 25):
        for theta in np.radians([30, 60, 90, 120, 150]):
            z = r_cells * dx * np.sin(theta)
            out = half_space_fields(phi0, dx, z, pad=0, hessian=False)
            i = int(np.argmin(np.abs(x - r_cells * dx * np.cos(theta))))
            r = np.hypot(x[i], z)
            e = np.hypot(out.gradient[0, 0, i], out.gradient[2, 0, i])
            worst = max(worst, abs(e / (V / (np.pi * r)) - 1))
    assert worst < 5e-3


def test_linear_gap_closed_form_three_heights():
    """Gap 2g with linear potential: |Ex(0, z)| = (V/(pi g)) arctan(g/z), at z = g/2, g, 3g.

    [derived] CHECKS.md closed form. The layout is periodic (two electrodes per period L), so the
    image gaps at x = n L/2 (alternating sign) are added with the same formula shifted to their
    centre, -(V/(2 pi g)) [arctan((g - x_c)/z) + arctan((g + x_c)/z)]. The Laplace gap fill gives the
    linear profile exactly; the error is discretisation (second order in the grid spacing).
    """
    g, L, V = 10e-6, 400e-6, 2.0
    lay = ElectrodeLayout({"A": box(g, -L / 8, L / 2 - g, L / 8), "B": box(-L / 2 + g, -L / 8, -g, L / 8)})
    n_img = np.arange(-20000, 20001)
    xc = n_img * L / 2

    def closed(z):
        return abs(np.sum((-1.0) ** n_img * V / (2 * np.pi * g) * (np.arctan((g - xc) / z) + np.arctan((g + xc) / z))))

    errs = []
    for nx in (400, 800):
        u = UnitResponses(lay, Grid.cell((-L / 2, L / 2, -L / 8, L / 8), nx, 8), cache_dir=False,
                          gap_model="linear")
        e = []
        for z in (g / 2, g, 3 * g):
            grad, _ = u.pattern([V / 2, -V / 2], z)
            e.append(abs(abs(grad[0, 4, nx // 2]) / closed(z) - 1))
        errs.append(max(e))
    # single gap of the CHECKS formula itself, for the record: the image correction is small here
    assert closed(g) == pytest.approx(V / (np.pi * g) * np.arctan(1.0), rel=1e-2)
    assert errs[0] < 1e-3
    assert errs[1] < errs[0] / 3          # converges (second order: ratio ~4)


def test_padded_fft_matches_poisson_integral():
    """Non-periodic (zero-padded) path: Gaussian floor potential against the half-space Poisson integral.

    [pub] textbook Dirichlet problem of the half-space: phi(0, 0, z) = int z / (2 pi (rho^2 + z^2)^{3/2})
    phi0 dA, evaluated here by quadrature. The periodic images left by zero padding add an error
    ~ z / D^3 (D the padded period), so it must fall about 8x from pad=1 to pad=3.
    """
    n, dx, s = 128, 1e-6, 6e-6
    x = (np.arange(n) - n // 2) * dx
    X, Y = np.meshgrid(x, x)
    phi0 = np.exp(-(X**2 + Y**2) / (2 * s * s))

    def err(z, pad):
        out = half_space_fields(phi0, dx, z, pad=pad, potential=True, hessian=False)
        zs = z / s          # in units of s, so that quad sees an O(1) integrand
        want, _ = integrate.quad(lambda t: zs * t * np.exp(-t * t / 2) / (t * t + zs * zs) ** 1.5, 0, np.inf)
        return abs(out.potential[n // 2, n // 2] / want - 1)

    assert err(2e-6, 1) < 2e-4 and err(8e-6, 1) < 1.5e-3
    assert err(20e-6, 3) < err(20e-6, 1) / 5 and err(20e-6, 3) < 1.5e-3


def test_superposition_of_unit_responses():
    """The field of two electrodes driven at once equals the sum of the unit responses.

    [pub] linearity of Laplace's equation; here checked against a direct floor solve with both voltages.
    """
    lay = pad_array(1, 3, 40e-6, 15e-6)
    grid = Grid.around(lay, 96)
    units = UnitResponses(lay, grid, cache_dir=False)
    v = np.array([1.7, -0.6, 0.0])
    solver = FloorSolver(lay, grid)
    direct_floor = solver.solve(v)
    # the floor solve is iterative (relative residual 1e-9): superposition holds to that level
    np.testing.assert_allclose(direct_floor, np.tensordot(v, units.floor, axes=1), atol=1e-8)
    direct = solver.fields(v, 6e-6)
    grad, hess = units.pattern(v, 6e-6)
    np.testing.assert_allclose(grad, direct.gradient, atol=1e-7 * np.max(np.abs(grad)))
    np.testing.assert_allclose(hess, direct.hessian, atol=1e-7 * np.max(np.abs(hess)))
    # the linear gap model is solved directly (sparse LU): exact superposition there
    lin = UnitResponses(lay, grid, cache_dir=False, gap_model="linear")
    np.testing.assert_allclose(FloorSolver(lay, grid, gap_model="linear").solve(v),
                               np.tensordot(v, lin.floor, axes=1), atol=1e-12)
    # the squared field is not additive (it is quadratic in the voltages)
    g1, _ = units.pattern([1.7, 0, 0], 6e-6)
    g2, _ = units.pattern([0, -0.6, 0], 6e-6)
    e_sum = np.sum(g1**2 + g2**2, axis=0)
    assert np.max(np.abs(np.sum(grad**2, axis=0) - e_sum)) > 0.05 * np.max(e_sum)


def test_floor_potential_is_bounded_and_held_on_electrodes():
    """Maximum principle: the floor potential lies between the electrode voltages (and 0 V, the frame or infinity).

    Linear model: discrete maximum principle of the 5-point Laplacian, electrode nodes exact.
    Insulating model: the harmonic potential of the mixed problem takes its extremes on the electrodes;
    fully covered nodes hold the voltage to the solver tolerance.
    """
    lay = interdigitated(4, 20e-6, 15e-6, 120e-6)
    solver = FloorSolver(lay, Grid.around(lay, 96), gap_model="linear")
    phi = solver.solve([3.0, -2.0])
    assert phi.max() == pytest.approx(3.0) and phi.min() == pytest.approx(-2.0)
    assert np.all(phi[solver.labels == 0] == 3.0) and np.all(phi[solver.labels == 1] == -2.0)
    solver = FloorSolver(lay, Grid.around(lay, 96))
    phi = solver.solve([3.0, -2.0])
    full = solver.coverage == 1.0
    # (to 1e-5 V: the floor potential is evaluated with the window's kernel, the solve with that of the
    # electrodes' bounding box; they differ by the far images of a short-range remainder, ~1e-6)
    np.testing.assert_allclose(phi[full & (solver.labels == 0)], 3.0, atol=1e-5)
    np.testing.assert_allclose(phi[full & (solver.labels == 1)], -2.0, atol=1e-5)
    assert phi.max() < 3.0 + 1e-5 and phi.min() > -2.0 - 1e-5
    # the normal field vanishes on the bare floor and is positive on the positive comb
    ez = solver.normal_field([3.0, -2.0])
    assert np.all(ez[solver.labels < 0] == 0.0) and ez[full & (solver.labels == 0)].min() > 0


def test_spline_matches_scipy_map_coordinates():
    """SplineMaps equals ndimage.map_coordinates(order=3) with the same boundary mode."""
    rng = np.random.default_rng(2)
    for periodic, mode in ((False, "mirror"), (True, "grid-wrap")):
        grid = Grid(0.0, 0.0, 1.0, 1.5, 20, 16, periodic)
        maps = rng.normal(size=(3, 16, 20))
        x0, x1, y0, y1 = grid.extent
        xy = rng.uniform([x0, y0], [x1, y1], size=(50, 2))
        xy[0] = (x1, y1) if not periodic else xy[0]
        got = SplineMaps(maps, grid)(xy)
        coords = np.vstack([(xy[:, 1] - grid.ymin) / grid.dy, (xy[:, 0] - grid.xmin) / grid.dx])
        for m in range(3):
            want = ndimage.map_coordinates(maps[m], coords, order=3, mode=mode)
            np.testing.assert_allclose(got[m], want, atol=1e-10)


# ---------------------------------------------------------------------------------------------
# Layouts and bad input
# ---------------------------------------------------------------------------------------------
def test_layout_helpers_geometry():
    assert pad_array(4, 4, 50e-6, 20e-6).min_gap == pytest.approx(20e-6)
    idt = interdigitated(6, 20e-6, 10e-6, 150e-6)
    assert idt.names == ("comb_a", "comb_b") and idt.min_gap == pytest.approx(10e-6)
    assert all(p.geom_type == "Polygon" for p in idt.polygons)       # each comb is one connected piece
    quad = quadrupole(40e-6, 100e-6)
    assert quad.min_gap == pytest.approx(40e-6 / np.sqrt(2))
    assert len(pad_array(4, 4, 50e-6, 20e-6).neighbours()) == 24      # 4-neighbour pairs of a 4x4 grid


def test_bad_layouts_raise():
    bowtie = Polygon([(0, 0), (1e-4, 1e-4), (1e-4, 0), (0, 1e-4)])
    with pytest.raises(ActuatorError, match="not a valid polygon"):
        ElectrodeLayout({"a": bowtie})
    with pytest.raises(ActuatorError, match="overlap"):
        ElectrodeLayout({"a": box(0, 0, 5e-5, 5e-5), "b": box(4e-5, 0, 9e-5, 5e-5)})
    with pytest.raises(ActuatorError, match="touch"):
        ElectrodeLayout({"a": box(0, 0, 5e-5, 5e-5), "b": box(5e-5, 0, 9e-5, 5e-5)})
    with pytest.raises(ActuatorError, match="reserved"):
        ElectrodeLayout({"frequency": box(0, 0, 5e-5, 5e-5)})
    lay = pad_array(2, 2, 50e-6, 4e-6)
    with pytest.raises(ActuatorError, match="not resolved|same grid node"):
        FloorSolver(lay, Grid.around(lay, 16))
    with pytest.raises(ActuatorError, match="outside the grid window"):
        FloorSolver(lay, Grid(0.0, 0.0, 1e-6, 1e-6, 32, 32))


def test_bad_bodies_and_frequencies_raise(small_array):
    u = np.array(small_array.primitives()[0].values)
    sunk = Body("sunk", radius=3e-6, density=1050.0, permittivity=2.55)
    object.__setattr__(sunk, "height", 1e-6)       # Body itself refuses this; simulate a corrupted object
    with pytest.raises(ActuatorError, match="below its radius"):
        small_array.velocity(sunk, BUFFER, [[0.0, 0.0]], u)
    plain = Body("plain", radius=3e-6, density=1050.0)
    with pytest.raises(ActuatorError, match="no dielectric properties"):
        small_array.velocity(plain, BUFFER, [[0.0, 0.0]], u)
    both = Body("both", radius=5e-6, density=1070.0, shell=CELL.shell, surface_conductance=1e-9)
    with pytest.raises(ActuatorError, match="surface_conductance"):
        clausius_mossotti(1e5, both, BUFFER)
    for bad in (0.0, -1e5, np.nan):
        with pytest.raises(ActuatorError, match="frequency"):
            clausius_mossotti(bad, BEAD, BUFFER)
    with pytest.raises(ActuatorError, match="f_min"):
        crossover_frequencies(BEAD, BUFFER, 0.0, 1e9)
    with pytest.raises(ActuatorError, match="frequencies"):
        ElectrodeArray(pad_array(1, 2, 50e-6, 20e-6), [0.0, 1e5], grid_points=32)
    with pytest.raises(ActuatorError, match="frequency"):       # not one of the allowed values
        small_array.velocity(BEAD, BUFFER, [[0.0, 0.0]], np.append(u[:-1], 3e5))
    with pytest.raises(ActuatorError, match="outside the field grid window"):
        small_array.velocity(BEAD, BUFFER, [[1.0, 0.0]], u)
    with pytest.raises(ActuatorError, match="voltage_limit"):
        ElectrodeArray(pad_array(1, 2, 50e-6, 20e-6), [1e5], voltage_limit=1.0, patterns={"p": [2.0, 0.0]})


# ---------------------------------------------------------------------------------------------
# The actuator
# ---------------------------------------------------------------------------------------------
def test_check_actuator_heterogeneous(small_array):
    """The contract suite, with three body kinds at three heights (different K(f), radius, height)."""
    check_actuator(small_array, [BEAD, CELL, BIG_BEAD], BUFFER)


def test_check_actuator_quadrupole_user_patterns():
    quad = ElectrodeArray(quadrupole(60e-6, 80e-6), [5e4, 2e6], voltage_limit=3.0, grid_points=160,
                          patterns={"trap": [3, -3, 3, -3], "east": [3, 0, 0, 0], "ew": [3, 0, -3, 0]})
    assert [p.name for p in quad.primitives()][:3] == ["trap@50kHz", "east@50kHz", "ew@50kHz"]
    check_actuator(quad, [CELL, BIG_BEAD], BUFFER, rng=3)


def test_quadrupole_traps_ndep_and_repels_pdep():
    """In a quadrupole driven +-+- the field vanishes at the centre: nDEP particles move inwards, pDEP outwards.

    [pub] DEP force along grad|E|^2 with the sign of Re K (Jones 1995; Morgan & Green 2003); the field
    null at the centre of a quadrupole by its symmetry.
    """
    quad = ElectrodeArray(quadrupole(60e-6, 80e-6), [1e6], voltage_limit=3.0, grid_points=128,
                          patterns={"trap": [3, -3, 3, -3]})
    u = quad.primitives()[0].values
    same_height_bead = Body("bead-at-cell-height", radius=3e-6, density=1050.0, permittivity=2.55,
                            surface_conductance=1e-9, height=CELL.height)
    phi = np.linspace(0, 2 * np.pi, 16, endpoint=False) + 0.2
    xy = 8e-6 * np.column_stack([np.cos(phi), np.sin(phi)])
    radial = xy / np.linalg.norm(xy, axis=1, keepdims=True)
    v_cell = quad.velocity(CELL, BUFFER, xy, u)
    v_bead = quad.velocity(same_height_bead, BUFFER, xy, u)
    assert clausius_mossotti(1e6, CELL, BUFFER).real > 0 > clausius_mossotti(1e6, BEAD, BUFFER).real
    assert np.all(np.sum(v_cell * radial, axis=1) > 0)
    assert np.all(np.sum(v_bead * radial, axis=1) < 0)
    # same height, same field: velocities are parallel, ratio = r^3 Re K / drag ratio
    ratio = (CELL.radius**3 * clausius_mossotti(1e6, CELL, BUFFER).real / drag_coefficient(CELL, BUFFER)) / (
        same_height_bead.radius**3 * clausius_mossotti(1e6, same_height_bead, BUFFER).real
        / drag_coefficient(same_height_bead, BUFFER))
    np.testing.assert_allclose(v_cell, ratio * v_bead, rtol=1e-10, atol=1e-20)


def test_periodic_finger_array_velocity_is_periodic():
    """An infinite finger array (one period as a periodic grid): velocity repeats with the period.

    The force is also mirror-symmetric about a finger's centre line under the symmetric +,- drive,
    so v_x is odd there ([pub] symmetry of Laplace's equation with symmetric boundary data).
    """
    w, gap = 20e-6, 20e-6
    period = 2 * (w + gap)
    lay = ElectrodeLayout({"f_plus": box(-w / 2, -50e-6, w / 2, 50e-6),
                           "f_minus": box(w / 2 + gap, -50e-6, 1.5 * w + gap, 50e-6)})
    grid = Grid.cell((-period / 2, period / 2, -50e-6, 50e-6), 64, 80)
    arr = ElectrodeArray(lay, [1e6], voltage_limit=2.0, grid=grid, patterns={"pm": [2.0, -2.0]})
    u = arr.primitives()[0].values
    xs = np.linspace(-period / 2, period / 2, 9)
    xy = np.column_stack([xs, np.zeros_like(xs)])
    v = arr.velocity(CELL, BUFFER, xy, u)
    v_shift = arr.velocity(CELL, BUFFER, xy + [period, 0.0], u)
    np.testing.assert_allclose(v_shift, v, atol=1e-9 * np.max(np.abs(v)))
    mirror = arr.velocity(CELL, BUFFER, xy * [-1, 1], u)
    np.testing.assert_allclose(mirror[:, 0], -v[:, 0], atol=1e-6 * np.max(np.abs(v)))
    assert np.max(np.abs(v[:, 0])) > 1e-7


def test_velocity_is_quadratic_in_voltage_and_sign_symmetric(small_array):
    """F ~ grad|E|^2 and E ~ V [pub force law]: v(a V) = a^2 v(V); antiphase flip of all electrodes changes nothing."""
    arr = small_array
    xy = np.random.default_rng(1).uniform(-60e-6, 60e-6, size=(12, 2))
    u = np.array([1.0, -0.5, 0.3, 0.0, 1e6])
    v1 = arr.velocity(CELL, BUFFER, xy, u)
    v2 = arr.velocity(CELL, BUFFER, xy, np.append(2 * u[:-1], 1e6))
    vm = arr.velocity(CELL, BUFFER, xy, np.append(-u[:-1], 1e6))
    np.testing.assert_allclose(v2, 4 * v1, rtol=1e-9, atol=1e-12 * np.max(np.abs(v2)))
    np.testing.assert_allclose(vm, v1, rtol=1e-9, atol=1e-12 * np.max(np.abs(v1)))


def test_fast_basis_equals_generic_basis(small_array):
    rng = np.random.default_rng(4)
    bodies = [BEAD, CELL, BIG_BEAD, CELL, BEAD]
    xy = rng.uniform(-70e-6, 70e-6, size=(5, 2))
    fast = small_array.basis(bodies, BUFFER, xy)
    slow = Actuator.basis(small_array, bodies, BUFFER, xy)
    assert fast.mode == slow.mode == "timeshare"
    assert [p.name for p in fast.primitives] == [p.name for p in slow.primitives]
    np.testing.assert_allclose(fast.fields, slow.fields, rtol=1e-12, atol=1e-14 * np.max(np.abs(slow.fields)))
    assert np.all(fast.drift == 0)


def test_realistic_speeds(small_array):
    """2 V on 50 um pads with 20 um gaps moves a cell at um/s to tens of um/s near the gaps (PHYSICS-NOTES range)."""
    u = small_array.primitives()[-1].values
    x = np.linspace(-80e-6, 80e-6, 41)
    xy = np.column_stack([x, np.full_like(x, 25e-6)])
    speed = np.linalg.norm(small_array.velocity(CELL, BUFFER, xy, u), axis=1)
    assert 1e-6 < np.max(speed) < 5e-3


def test_pickle_drops_caches(small_array):
    small_array.velocity(CELL, BUFFER, [[0.0, 0.0]], small_array.primitives()[1].values)
    blob = pickle.dumps(small_array)
    assert len(blob) < 200_000
    clone = pickle.loads(blob)
    xy = [[10e-6, -5e-6]]
    u = small_array.primitives()[1].values
    np.testing.assert_array_equal(clone.velocity(CELL, BUFFER, xy, u), small_array.velocity(CELL, BUFFER, xy, u))


# ---------------------------------------------------------------------------------------------
# Warnings
# ---------------------------------------------------------------------------------------------
def test_operating_warnings():
    lay = pad_array(1, 2, 50e-6, 20e-6)
    arr = ElectrodeArray(lay, [1e3, 1e6], voltage_limit=20.0, grid_points=96, field_limit=1e6)
    low = Medium("low", relative_permittivity=78.0, conductivity=1e-3)
    pdep = Body("bead", radius=4e-6, density=1050.0, permittivity=2.55)
    quiet = [2.0, -2.0]
    cm = _benign()
    try:
        assert arr.operating_warnings(low, quiet, 1e6, 5e-6) == []
        arr.velocity(pdep, low, [[0.0, 0.0]], quiet + [1e6])
    finally:
        cm.__exit__(None, None, None)
    cats = [c for c, _ in arr.operating_warnings(BUFFER, quiet, 1e3, 5e-6)]
    assert cats == [ElectrolysisWarning]

    def caught(fn):
        with warnings.catch_warnings(record=True) as rec:
            warnings.simplefilter("always")
            fn()
        return {w.category: str(w.message) for w in rec}

    got = caught(lambda: arr.velocity(pdep, BUFFER, [[0.0, 0.0]], quiet + [1e3]))
    assert set(got) == {ElectrolysisWarning} and "common practice" in got[ElectrolysisWarning]
    salty = Medium("salty", relative_permittivity=78.0, conductivity=0.1)
    got = caught(lambda: arr.velocity(pdep, salty, [[0.0, 0.0]], [20.0, -20.0, 1e6]))
    assert JouleHeatingWarning in got and "order of magnitude" in got[JouleHeatingWarning]
    strict = ElectrodeArray(lay, [1e6], voltage_limit=20.0, grid_points=96, field_limit=1e4)
    got = caught(lambda: strict.velocity(pdep, low, [[0.0, 0.0]], [2.0, -2.0, 1e6]))
    assert set(got) == {FieldLimitWarning} and "declared limit" in got[FieldLimitWarning]
    # warnings also come from basis(), once per primitive set, medium and height
    got = caught(lambda: arr.basis([pdep], BUFFER, [[0.0, 0.0]]))
    assert ElectrolysisWarning in got and "primitive" in got[ElectrolysisWarning]
    assert caught(lambda: arr.basis([pdep], BUFFER, [[1e-6, 0.0]])) == {}
    # dT ~ sigma V_rms^2 / k: order-of-magnitude rule [memory] - check only the arithmetic of the stated form
    assert joule_heating_estimate(10.0, 0.06, 0.6) == pytest.approx(10.0)


def test_resolution_warning():
    with pytest.warns(ResolutionWarning, match="narrowest gap"):     # 20 um gap, 7.8 um spacing
        arr = ElectrodeArray(pad_array(1, 2, 50e-6, 20e-6), [1e6], grid_points=24)
    with pytest.warns(ResolutionWarning, match="grid spacings"):
        arr.velocity(BEAD, BUFFER, [[0.0, 0.0]], arr.primitives()[0].values)


# ---------------------------------------------------------------------------------------------
# Cache
# ---------------------------------------------------------------------------------------------
def test_disk_cache_round_trip(tmp_path, monkeypatch):
    lay = pad_array(2, 2, 40e-6, 15e-6)
    grid = Grid.around(lay, 48)
    first = UnitResponses(lay, grid, cache_dir=tmp_path)
    maps = first.maps(5e-6)
    files = sorted(p.name for p in tmp_path.iterdir())
    assert len(files) == 2 and all(f.startswith("dep-") and f.endswith(".npy") for f in files)
    es.clear_memory_cache()

    def boom(self):
        raise AssertionError("recomputed although cached")

    monkeypatch.setattr(FloorSolver, "unit_responses", boom)
    monkeypatch.setattr(FloorSolver, "unit_normal_fields", boom)
    again = UnitResponses(lay, grid, cache_dir=tmp_path)
    np.testing.assert_array_equal(again.maps(5e-6), maps)
    np.testing.assert_array_equal(again.floor, first.floor)
    monkeypatch.undo()
    # a different height, grid or gap model is a different key
    assert first.key(5e-6) != first.key(6e-6) != UnitResponses(lay, Grid.around(lay, 50)).key(6e-6)
    assert first.key(5e-6) != UnitResponses(lay, grid, gap_model="linear").key(5e-6)
    # a damaged file is ignored with a warning, recomputed and rewritten atomically (no temp files left)
    es.clear_memory_cache()
    for p in tmp_path.iterdir():
        p.write_bytes(b"garbage")
    with pytest.warns(es.CacheWarning):
        fresh = UnitResponses(lay, grid, cache_dir=tmp_path).maps(5e-6)
    np.testing.assert_array_equal(fresh, maps)
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".tmp")]


def test_cache_dir_from_environment(tmp_path, monkeypatch):
    monkeypatch.setenv("FIELDPLAN_CACHE", str(tmp_path / "env-cache"))
    es.clear_memory_cache()
    lay = pad_array(1, 2, 40e-6, 15e-6)
    UnitResponses(lay, Grid.around(lay, 32)).floor
    assert len(list((tmp_path / "env-cache").iterdir())) == 1
    off = tmp_path / "off"
    UnitResponses(lay, Grid.around(lay, 33), cache_dir=False).floor
    assert not off.exists() and len(list((tmp_path / "env-cache").iterdir())) == 1


# ---------------------------------------------------------------------------------------------
# Plots
# ---------------------------------------------------------------------------------------------
def test_plots_return_labelled_figures(small_array):
    import matplotlib.pyplot as plt

    prim = small_array.primitives()[-1]
    fig = plot_field_magnitude(small_array, prim, CELL.height)
    assert fig.axes[0].get_xlabel() == "x (um)" and "kV/m" in fig.axes[1].get_ylabel()
    fig2 = plot_velocity_fields(small_array, [CELL, BEAD], BUFFER, prim.name, n=24, arrows=8)
    assert len(fig2.axes) == 4 and sum("um/s" in a.get_ylabel() for a in fig2.axes) == 2
    fig3 = plot_clausius_mossotti([CELL, BEAD], BUFFER)
    assert fig3.axes[0].get_legend() is not None
    for f in (fig, fig2, fig3):
        plt.close(f)

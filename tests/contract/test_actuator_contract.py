"""Every built-in actuator passes the contract suite (fieldplan.contract.testing.check_actuator),
including heterogeneous bodies, and is discoverable through the entry-point registry."""

import numpy as np
import pytest

import fieldplan
from fieldplan import Body, Shell, air, water
from fieldplan.contract.testing import check_actuator


def coil_ring(bead_models):
    from fieldplan.actuators.magnetic import Coil, CoilArray
    coils = [Coil((0.02 * np.cos(a), 0.02 * np.sin(a), -0.007), (0, 0, 1), radius=0.006, turns=300,
                  length=0.010, layers=6, current_limit=3.0, resistance=2.0)
             for a in np.linspace(0, 2 * np.pi, 8, endpoint=False)]
    return CoilArray(coils, plane_height=0.0, bead_models=bead_models, extent=(-0.01, 0.01, -0.01, 0.01))


def small_plate():
    from fieldplan.actuators.acoustic import Plate
    # a small band keeps the test fast (few modes, few tones)
    return Plate(0.15, 0.15, 1e-3, material="aluminium", edges="free", supports=[(0.01, 0.02)],
                 excitation="base", gain=1e-6, band=(150.0, 900.0), n_tones=8)


def pads():
    from fieldplan.actuators.dielectric import ElectrodeArray
    from fieldplan.actuators.electrostatics import pad_array
    return ElectrodeArray(pad_array(2, 2, pad=60e-6, gap=20e-6), frequencies=[1e5, 1e6],
                          voltage_limit=2.0, grid_points=96)


CELL = Body("cell", 5e-6, 1070.0, shell=Shell(7e-9, 10.0, 1e-7, 60.0, 0.5))
BEAD_DEP = Body("bead", 3e-6, 1050.0, permittivity=2.55, surface_conductance=1e-9)


CASES = {
    "coil-array fixed moment": (lambda: coil_ring("fixed"),
                                [Body("magnet", 1e-4, 7500.0, moment=(1e-6, 0, 0)),
                                 Body("magnet-up", 5e-5, 7500.0, moment=(0, 0, 3e-7))], water()),
    "coil-array soft beads": (lambda: coil_ring("linear"),
                              [Body("bead-2um", 1e-6, 1800.0, susceptibility=1.0),
                               Body("bead-5um", 2.5e-6, 1800.0, susceptibility=0.5)], water()),
    "coil-array saturating": (lambda: coil_ring("saturating"),
                              [Body("sat", 1.4e-6, 1800.0, susceptibility=1.0, saturation_magnetization=2e4)],
                              water()),
    "plate in air": (small_plate, [Body("sand", 2.5e-4, 2600.0),
                                   Body("poppy", 5e-4, 1100.0, drift_mobility=50.0)], air()),
    "plate submerged": (small_plate, [Body("glass", 2.5e-4, 2500.0)], water()),
    "electrode-array": (pads, [CELL, BEAD_DEP], water(conductivity=0.01)),
}


@pytest.mark.filterwarnings("ignore:.*under-resolved")
@pytest.mark.parametrize("name", list(CASES))
def test_builtin_actuator_passes_contract(name):
    make, bodies, medium = CASES[name]
    act = make()
    pts = None
    if act.extent is not None:
        x0, x1, y0, y1 = act.extent
        pts = np.random.default_rng(1).uniform([0.8 * x0, 0.8 * y0], [0.8 * x1, 0.8 * y1], (12, 2))
    check_actuator(act, bodies, medium, points=pts)


@pytest.mark.parametrize("name, module", [("coil-array", "fieldplan.actuators.magnetic"), ("plate", "fieldplan.actuators.acoustic"),
                                          ("electrode-array", "fieldplan.actuators.dielectric"),
                                          ("source-array", "fieldplan.contract.testing")])
def test_builtins_are_registered(name, module):
    cls = fieldplan.contract.registry.load_actuator_class(name)
    assert cls.__module__ == module

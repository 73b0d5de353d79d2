"""Symmetry limits steerability (PHYSICS-NOTES.md): a square plate driven at its centre excites only
modes symmetric about it, so bodies at mirror positions cannot be separated and a body on a mirror
line cannot leave it; driving off every symmetry line makes both steerable. The physical statement is
the plate symmetry argument (Leissa 1969: modes of a square plate are symmetric or antisymmetric about
its mid-lines and diagonals; an antisymmetric mode vanishes at the centre)."""

import pytest

from fieldplan import Body, water
from fieldplan.analysis import basis_function, mirror_check


def plate(drive_point):
    from fieldplan.actuators.acoustic import Plate
    return Plate(0.15, 0.15, 1e-3, material="aluminium", edges="free", excitation="force",
                 drive_point=drive_point, gain=0.05, band=(150.0, 1500.0), n_tones=24)


BEAD = Body("glass", 2.5e-4, 2500.0)


@pytest.mark.parametrize("line_point, line_direction", [((0, 0), (0, 1)), ((0, 0), (1, 1))])
def test_centre_drive_cannot_separate_mirror_pair(line_point, line_direction):
    at = basis_function(plate((0.0, 0.0)), BEAD, water())
    rep = mirror_check(at, point=(0.031, 0.012), line_point=line_point, line_direction=line_direction)
    assert not rep.pair_separable, rep.summary()
    assert not rep.can_leave_line, rep.summary()


def test_off_centre_drive_breaks_the_symmetry():
    at = basis_function(plate((0.031, 0.017)), BEAD, water())
    rep = mirror_check(at, point=(0.031, 0.012), line_point=(0, 0), line_direction=(0, 1))
    assert rep.pair_separable, rep.summary()
    assert rep.can_leave_line, rep.summary()

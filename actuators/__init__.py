"""Built-in actuator models of fieldplan, each a plug-in like any third-party one.

Magnetic coil arrays (``actuators.magnetic``)
    CoilArray, Coil, helmholtz_pair, maxwell_pair, loop_field, loop_field_gradient
Vibrating plates (``actuators.acoustic``, ``actuators.plate_modes``)
    Plate, tone_set, hop_threshold, plate_modes, PlateModes
Electrode arrays, dielectrophoresis (``actuators.dielectric``, ``actuators.electrostatics``)
    ElectrodeArray, clausius_mossotti, crossover_frequencies, ElectrodeLayout, pad_array,
    interdigitated, quadrupole
"""

from .acoustic import Plate, hop_threshold, tone_set
from .dielectric import ElectrodeArray, clausius_mossotti, crossover_frequencies
from .electrostatics import ElectrodeLayout, interdigitated, pad_array, quadrupole
from .magnetic import Coil, CoilArray, helmholtz_pair, loop_field, loop_field_gradient, maxwell_pair
from .plate_modes import PlateModes, plate_modes

__all__ = [
    "CoilArray", "Coil", "helmholtz_pair", "maxwell_pair", "loop_field", "loop_field_gradient",
    "Plate", "tone_set", "hop_threshold", "plate_modes", "PlateModes",
    "ElectrodeArray", "clausius_mossotti", "crossover_frequencies", "ElectrodeLayout", "pad_array",
    "interdigitated", "quadrupole",
]

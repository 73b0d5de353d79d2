"""The contract between planner and hardware: actuators, their channels, schedules and limits, discovery.

=================================  ===================================================================
:mod:`~fieldplan.contract.actuator`  :class:`Actuator`, :class:`Channel`, :class:`Primitive`, :class:`FieldBasis`,
                                     :class:`Segment`, :data:`TAGS`
:mod:`~fieldplan.contract.schedule`  :class:`Schedule`, :class:`HardwareLimits`, :class:`ChannelLimit`: quantise,
                                     check, CSV/JSON
:mod:`~fieldplan.contract.registry`  actuator discovery (entry-point group ``fieldplan.actuators``, or
                                     ``module:Class``): the only module that imports actuator packages
:mod:`~fieldplan.contract.testing`   :func:`check_actuator`, the contract suite, and the analytic :class:`SourceArray`
=================================  ===================================================================

``fieldplan.actuator``, ``fieldplan.schedule``, ``fieldplan.registry`` and ``fieldplan.testing`` are
the earlier names of these modules and still import.
"""

from .actuator import TAGS, Actuator, Channel, FieldBasis, Primitive, Segment
from .registry import available_actuators, load_actuator
from .schedule import ChannelLimit, HardwareLimits, Schedule

__all__ = ["Actuator", "Channel", "Primitive", "FieldBasis", "Segment", "TAGS", "Schedule", "HardwareLimits",
           "ChannelLimit", "available_actuators", "load_actuator"]

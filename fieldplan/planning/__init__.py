"""The planner: cost-to-go maps, the horizon program, the receding-horizon controller, recovery.

=====================================  ==================================================================
:mod:`~fieldplan.planning.settings`    :class:`PlanSettings`, :func:`check_goals`
:mod:`~fieldplan.planning.costtogo`    each body's time-to-goal map by Dijkstra on field-weighted edges
:mod:`~fieldplan.planning.program`     the sparse horizon QP, set up once per shape, re-solved warm (OSQP)
:mod:`~fieldplan.planning.base`        inputs, limits, the period and segments shared by the controllers
:mod:`~fieldplan.planning.controller`  :class:`Controller`: receding-horizon sequential convex programming
:mod:`~fieldplan.planning.recovery`    fresh starting sequences after a stall
=====================================  ==================================================================

:func:`make_controller` builds the controller that ``PlanSettings.method`` names; :func:`fieldplan.plan.plan`,
:func:`fieldplan.live.closed_loop` and :func:`fieldplan.live.run_live` all go through it.
"""

from .controller import Controller
from .costtogo import CostToGo, cost_to_go
from .program import HorizonData, HorizonProgram, HorizonSolution
from .settings import PlanSettings, check_goals

__all__ = ["Controller", "CostToGo", "cost_to_go", "HorizonData", "HorizonProgram", "HorizonSolution",
           "PlanSettings", "check_goals", "make_controller"]


def make_controller(actuator, bodies, workspace, goals, *, limits=None, settings=None):
    """The controller ``settings.method`` names (``"horizon"``: :class:`Controller`; ``"step"``:
    :class:`fieldplan.plan.StepController`)."""
    if isinstance(settings, dict):
        settings = PlanSettings.from_dict(settings)
    if settings is not None and settings.method == "step":
        # deferred import: import cycle: fieldplan.planning.plan imports this package (Controller, PlanSettings)
        from .plan import StepController  # noqa: PLC0415

        return StepController(actuator, bodies, workspace, goals, limits=limits, settings=settings)
    return Controller(actuator, bodies, workspace, goals, limits=limits, settings=settings)

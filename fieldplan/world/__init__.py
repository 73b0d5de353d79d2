"""The physical world the planner acts on: the fluid, the bodies, wall physics, the plane, the simulator.

================================  ====================================================================
:mod:`~fieldplan.world.medium`     :class:`Medium` with ``water()`` (IAPWS viscosity) and ``air()``
:mod:`~fieldplan.world.body`       :class:`Body` and :class:`Shell`: plain validated data actuators read
:mod:`~fieldplan.world.physics`    Stokes drag, Faxén wall factor, Stokes–Einstein diffusion, regime warnings
:mod:`~fieldplan.world.workspace`  :class:`Workspace`: boundary, obstacles, free space, wall normals
:mod:`~fieldplan.world.simulate`   :class:`Simulator` and :func:`rollout`: truth actuator, Brownian motion, contacts
================================  ====================================================================
"""

from .body import Body, Shell
from .medium import Medium, air, water
from .simulate import Rollout, Simulator, compute_metrics, rollout
from .workspace import Workspace, circle, polygon, rectangle

__all__ = ["Medium", "water", "air", "Body", "Shell", "Workspace", "rectangle", "circle", "polygon", "Simulator",
           "Rollout", "rollout", "compute_metrics"]

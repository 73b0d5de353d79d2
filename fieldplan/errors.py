"""Exception types of fieldplan.

Every exception subclasses a built-in (``ValueError``) so that callers who do not know
fieldplan can still catch it; messages name what was wrong, the value received and the fix.
"""

from __future__ import annotations

__all__ = [
    "FieldplanError",
    "UnitError",
    "ActuatorError",
    "WorkspaceError",
    "LimitError",
    "ScenarioError",
]


class FieldplanError(ValueError):
    """Base class of all fieldplan input errors."""


class UnitError(FieldplanError):
    """A quantity had the wrong dimension, an unknown unit, or could not be parsed."""


class ActuatorError(FieldplanError):
    """An actuator was built or called with invalid input."""


class WorkspaceError(FieldplanError):
    """A workspace, body placement or geometry is invalid."""


class LimitError(FieldplanError):
    """A schedule breaks a declared hardware limit.

    Attributes
    ----------
    channel : str or None
        Name of the offending channel.
    time : float or None
        Start time of the offending segment or window, seconds.
    limit : str or None
        Which limit was broken (``"lower"``, ``"upper"``, ``"slew_rate"``, ``"rms"``, ...).
    """

    def __init__(self, message, *, channel=None, time=None, limit=None):
        super().__init__(message)
        self.channel = channel
        self.time = time
        self.limit = limit


class ScenarioError(FieldplanError):
    """A scenario file is invalid.

    Attributes
    ----------
    problems : list of tuple
        ``(file, line, key_path, message)`` for every problem found; the error message lists
        them all, one per line, so the user fixes a file in one pass.
    """

    def __init__(self, problems):
        if isinstance(problems, str):
            problems = [(None, None, None, problems)]
        self.problems = list(problems)
        super().__init__("\n".join(self.format_problem(*p) for p in self.problems))

    @staticmethod
    def format_problem(file, line, key, message):
        where = []
        if file is not None:
            where.append(str(file) + (f":{line}" if line is not None else ""))
        if key:
            where.append(f"key '{key}'")
        prefix = ", ".join(where)
        return f"{prefix}: {message}" if prefix else message

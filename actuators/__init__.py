"""Built-in actuator models of fieldplan, each a plug-in like any third-party one."""

__all__ = []

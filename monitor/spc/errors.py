"""One error tree for the statistical core.

::

    MonitorError
    ├── ConfigError        a parameter or configuration value is not allowed
    ├── StateError         a snapshot cannot be restored (bad, foreign or newer schema)
    ├── NotEnoughData      an estimate needs more subgroups or readings than it has
    └── ReadingError       a reading or subgroup cannot be used (not finite, wrong size)

Every message says what failed, for which object, and how to fix it.
"""

from __future__ import annotations

__all__ = ["ConfigError", "MonitorError", "NotEnoughData", "ReadingError", "StateError"]


class MonitorError(Exception):
    """Base of every error raised on purpose by the monitor."""


class ConfigError(MonitorError, ValueError):
    """A parameter is outside what is allowed; the message names it and the allowed values."""


class StateError(MonitorError, ValueError):
    """A snapshot cannot be restored into this object."""


class NotEnoughData(MonitorError):
    """An estimate needs more data than it was given.

    Args:
        what: the object that needs the data, e.g. ``"baseline of chart 'press-2/bore'"``.
        needed: how many items it needs.
        have: how many it has.
        unit: what is counted.

    Examples:
        >>> print(NotEnoughData("baseline", needed=20, have=7, unit="subgroups"))
        baseline needs 20 subgroups, has 7
    """

    def __init__(self, what: str, *, needed: int, have: int, unit: str) -> None:
        self.what = what
        self.needed = needed
        self.have = have
        self.unit = unit
        super().__init__(f"{what} needs {needed} {unit}, has {have}")


class ReadingError(MonitorError, ValueError):
    """A reading or subgroup cannot be charted (not finite, empty, wrong size)."""

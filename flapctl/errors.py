"""One exception tree for the whole project.

Every error a user can cause names what was wrong: the file, the dotted key path or
field, the bad value and what was expected.  Subclasses also inherit the matching
builtin so that callers may catch either.
"""
from __future__ import annotations

__all__ = [
    "FlapctlError",
    "ProfileError",
    "ScheduleError",
    "BusError",
    "BusTimeout",
    "SafetyTrip",
    "RunLogError",
]


class FlapctlError(Exception):
    """Root of all flapctl errors."""


class ProfileError(FlapctlError, ValueError):
    """A rig profile (or another input file) is invalid.

    ``source`` is the file, ``key`` the dotted key path, ``value`` what was found and
    ``expected`` what would have been accepted.
    """

    def __init__(self, source: str, key: str, value: object, expected: str) -> None:
        self.source = str(source)
        self.key = key
        self.value = value
        self.expected = expected
        shown = repr(value)
        if len(shown) > 80:
            shown = shown[:77] + "..."
        super().__init__(f"{self.source}: {key} = {shown}: expected {expected}")


class ScheduleError(ProfileError):
    """A flap schedule file is invalid (same fields as ProfileError)."""


class BusError(FlapctlError, OSError):
    """The servo bus or I/O bridge failed (bus-off, lost telemetry, transport error)."""


class BusTimeout(BusError, TimeoutError):
    """A bus operation or expected telemetry did not arrive in time."""


class SafetyTrip(FlapctlError):
    """An interlock tripped; ``reason`` is a short machine-readable code."""

    def __init__(self, reason: str, detail: str = "") -> None:
        self.reason = reason
        self.detail = detail
        super().__init__(f"{reason}: {detail}" if detail else reason)


class RunLogError(FlapctlError, OSError):
    """The run log cannot be created or written."""

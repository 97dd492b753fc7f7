"""What a rig must provide: the hardware boundary of flapctl.

Everything above this module (estimator, schedule, scheduler, supervisor, ledger) is the same
whether water, wind or the software-in-the-loop model turns the rotor.  A backend implements
:class:`RigPorts`; the base class owns the generic lifecycle (idempotent ``close`` that first
commands the safe state, context manager, a warning when never closed).

Conventions at this boundary
----------------------------
* ``counts`` is the raw quadrature counter after 4x decoding, as a hardware counter holds it:
  a non-negative integer that wraps modulo ``2**counter_bits``.
* ``index_latch`` is the counter value latched at the most recent index pulse, ``index_events``
  how many index pulses have been seen; both are ``None``/0 until the first pulse.
* Flap angles in degrees, sign as REFERENCES section 2 (positive = trailing edge to the side
  that adds lift in the positive-alpha sense).  Brake command as a torque in N m (>= 0); the
  backend scales it to its own units with the profile's command scaling.
"""
from __future__ import annotations

import logging
import warnings
from abc import ABC, abstractmethod
from collections.abc import Sequence

__all__ = ["Sample", "RigPorts"]

log = logging.getLogger(__name__)


class Sample:
    """One reading of the rig, refilled in place every tick (no allocation on the hot path)."""

    __slots__ = (
        "t_s", "counts", "index_latch", "index_events", "torque_nm", "flow_m_s", "thrust_n",
        "flap_deg", "servo_current_a", "servo_voltage_v", "telemetry_age_s",
    )

    def __init__(self, blades: int) -> None:
        self.t_s = 0.0
        self.counts = 0
        self.index_latch: int | None = None
        self.index_events = 0
        self.torque_nm = 0.0
        self.flow_m_s = 0.0
        self.thrust_n = float("nan")            # NaN when the rig has no streamwise load cell
        self.flap_deg = [0.0] * blades           # servo feedback
        self.servo_current_a = [float("nan")] * blades   # NaN when the servo does not report it
        self.servo_voltage_v = [float("nan")] * blades
        self.telemetry_age_s = 0.0               # age of the newest servo telemetry

    #: the rig's own sensors (encoder counter, torque, flow, thrust), as opposed to servo telemetry
    IO_FIELDS = ("counts", "index_latch", "index_events", "torque_nm", "flow_m_s", "thrust_n")

    def copy(self) -> "Sample":
        other = Sample(len(self.flap_deg))
        other.copy_from(self)
        return other

    def copy_from(self, other: "Sample", fields: tuple[str, ...] | None = None) -> None:
        """Refill this sample in place from ``other`` (all fields, or just ``fields``)."""
        for name in self.__slots__ if fields is None else fields:
            value = getattr(other, name)
            if isinstance(value, list):
                getattr(self, name)[:] = value
            else:
                setattr(self, name, value)


class RigPorts(ABC):
    """A rig as the controller sees it: read sensors, command flaps and brake, go safe.

    Subclasses implement the four abstract methods.  ``close()`` is idempotent: it commands the
    safe state (flaps neutral, brake holding) and then releases the transport.
    """

    #: True when the servos report voltage and current (energy from telemetry, not estimated)
    reports_servo_power: bool = False

    def __init__(self, blades: int, brake_hold_nm: float) -> None:
        self.blades = blades
        self.brake_hold_nm = brake_hold_nm
        self._closed = False
        self._neutral = [0.0] * blades

    # -- what a backend must do -------------------------------------------------------------
    @abstractmethod
    def read(self) -> Sample:
        """Return the newest reading (the same Sample object, refilled)."""

    @abstractmethod
    def command_flaps(self, flap_deg: Sequence[float]) -> None:
        """Send one set-point per blade, in degrees."""

    @abstractmethod
    def command_brake(self, torque_nm: float) -> None:
        """Set the brake torque in N m."""

    @abstractmethod
    def _release(self) -> None:
        """Release the transport (bus, socket); called once by close()."""

    # -- shared behaviour ---------------------------------------------------------------------
    def heartbeat(self) -> None:
        """Tell the servos' watchdogs that the controller is alive (default: nothing to do)."""

    def safe(self) -> None:
        """Command the safe state: flaps neutral, brake holding."""
        self.command_flaps(self._neutral)
        self.command_brake(self.brake_hold_nm)

    def close(self) -> None:
        if self._closed:
            return
        self._closed = True
        try:
            self.safe()
        except Exception:  # the transport may already be gone; releasing it still matters
            log.exception("could not command the safe state while closing %s", type(self).__name__)
        finally:
            self._release()

    @property
    def closed(self) -> bool:
        return self._closed

    def __enter__(self) -> "RigPorts":
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def __del__(self) -> None:
        if not getattr(self, "_closed", True):
            warnings.warn(f"{type(self).__name__} was never closed", ResourceWarning, stacklevel=2)

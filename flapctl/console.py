"""Terminal output helpers: progress bars, tables and the safety notice."""
from __future__ import annotations

import sys
import time

__all__ = ["Progress", "table", "SAFETY_NOTICE", "SAFETY_SHORT"]

SAFETY_SHORT = ("CAUTION: flapctl is not a safety function. On a real rig: guard the rotor, keep an "
                "independent hard-wired emergency stop and overspeed trip, follow local codes and "
                "your lab's rules. (`flapctl safety` for more.)")

SAFETY_NOTICE = """\
SAFETY -- read before driving a real rig
  * A turning rotor and moving flaps can cut, crush and entangle. Guard the rotor and keep
    hands away from the flap hinges (pinch points) whenever servo power is on.
  * flapctl is NOT a safety function. It is ordinary software on an ordinary PC; its interlocks
    and safe state are a convenience, not protection.
  * Provide an independent, hard-wired emergency stop (ISO 13850; stop category 0 or 1 per
    IEC 60204-1) that removes actuator power and applies a fail-safe brake without any software.
  * Provide an independent overspeed trip (its own sensor and relay) and set flapctl's software
    limits below it.
  * Set up the servos' own watchdogs so that a lost controller heartbeat drops the flaps to a
    safe, neutral state.
  * In flumes keep electrical equipment out of splash zones, use RCD/GFCI protection and SELV
    supplies for anything wetted.
  * Local codes, your institution's rules and your lab's risk assessment come first.
"""


class Progress:
    """A one-line progress bar on stderr (a few plain lines when stderr is not a terminal)."""

    def __init__(self, label: str, stream=None, width: int = 30) -> None:
        self.label = label
        self.stream = stream if stream is not None else sys.stderr
        self.width = width
        self.tty = hasattr(self.stream, "isatty") and self.stream.isatty()
        self._last_pct = -1
        self._t0 = time.monotonic()

    def __call__(self, fraction: float) -> None:
        pct = int(fraction * 100)
        if pct == self._last_pct:
            return
        if not self.tty and pct % 25 and pct < 100:
            return
        self._last_pct = pct
        filled = int(self.width * fraction)
        elapsed = time.monotonic() - self._t0
        bar = "#" * filled + "." * (self.width - filled)
        end = "\r" if self.tty and pct < 100 else "\n"
        self.stream.write(f"{self.label} [{bar}] {pct:3d} % {elapsed:6.1f} s{end}")
        self.stream.flush()


def table(headers: list[str], rows: list[list[str]]) -> str:
    """A plain aligned text table."""
    widths = [max(len(h), *(len(r[i]) for r in rows)) if rows else len(h) for i, h in enumerate(headers)]
    line = "  ".join(h.ljust(w) if i == 0 else h.rjust(w) for i, (h, w) in enumerate(zip(headers, widths)))
    out = [line, "  ".join("-" * w for w in widths)]
    for r in rows:
        out.append("  ".join(c.ljust(w) if i == 0 else c.rjust(w) for i, (c, w) in enumerate(zip(r, widths))))
    return "\n".join(out)

"""Phase lead: how far ahead of the measured azimuth each flap command is looked up.

A flap that arrives late at its azimuth loses the gain it was meant to give.  The controller
looks the schedule up at ``theta_blade + lead(omega)`` where

* ``none``      -- lead = 0;
* ``angle``     -- lead = a constant angle (the profile's ``control.lead_deg``);
* ``dead_time`` -- lead = constant angle + omega * tau: a delay tau turned into an angle by the
  speed estimate (for a pure delay the exact compensation, REFERENCES section 9 step 4);
* ``table``     -- lead angle interpolated in a table versus rotor speed (from the tuning tools).

The model returns radians; it is evaluated once per tick.
"""
from __future__ import annotations

import bisect
import math
from collections.abc import Sequence

__all__ = ["LeadModel", "load_lead_table"]


class LeadModel:
    """Lead angle (rad) as a function of rotor speed (rad/s)."""

    __slots__ = ("mode", "angle_rad", "dead_time_s", "_speeds", "_leads")

    def __init__(self, mode: str = "none", angle_deg: float = 0.0, dead_time_s: float = 0.0,
                 table_speed_rad_s: Sequence[float] = (), table_lead_deg: Sequence[float] = ()) -> None:
        if mode not in ("none", "angle", "dead_time", "table"):
            raise ValueError(f"lead mode {mode!r}: expected one of 'none', 'angle', 'dead_time', 'table'")
        if mode == "table":
            if len(table_speed_rad_s) < 1 or len(table_speed_rad_s) != len(table_lead_deg):
                raise ValueError("lead table needs matching, non-empty speed and lead columns")
            if any(b <= a for a, b in zip(table_speed_rad_s, table_speed_rad_s[1:])):
                raise ValueError("lead table speeds must be strictly increasing")
        self.mode = mode
        self.angle_rad = math.radians(angle_deg) if mode in ("angle", "dead_time") else 0.0
        self.dead_time_s = dead_time_s if mode == "dead_time" else 0.0
        self._speeds = [float(v) for v in table_speed_rad_s]
        self._leads = [math.radians(v) for v in table_lead_deg]

    @classmethod
    def from_control(cls, control) -> "LeadModel":
        """From a profile's [control] section."""
        return cls(control.lead_mode, control.lead_deg, control.lead_dead_time_s)

    def __call__(self, omega_rad_s: float) -> float:
        if self.mode == "table":
            xs, ys = self._speeds, self._leads
            if omega_rad_s <= xs[0]:
                return ys[0]
            if omega_rad_s >= xs[-1]:
                return ys[-1]
            j = bisect.bisect_right(xs, omega_rad_s)
            f = (omega_rad_s - xs[j - 1]) / (xs[j] - xs[j - 1])
            return ys[j - 1] + f * (ys[j] - ys[j - 1])
        return self.angle_rad + omega_rad_s * self.dead_time_s

    def describe(self) -> str:
        if self.mode == "none":
            return "no lead"
        if self.mode == "angle":
            return f"constant {math.degrees(self.angle_rad):.2f} deg"
        if self.mode == "dead_time":
            return f"{math.degrees(self.angle_rad):.2f} deg + speed x {self.dead_time_s * 1e3:.2f} ms"
        return f"table of {len(self._speeds)} speeds"


def load_lead_table(path) -> LeadModel:
    """A ``table`` lead from a CSV ``speed_rad_s,lead_deg`` (as ``flapctl tune lead`` writes it)."""
    import csv
    from pathlib import Path

    from .errors import ProfileError

    path = Path(path)
    try:
        lines = [ln for ln in path.read_text(encoding="utf-8").splitlines()
                 if ln.strip() and not ln.lstrip().startswith("#")]
    except (OSError, UnicodeDecodeError) as exc:
        raise ProfileError(str(path), "<file>", str(path), f"a readable lead table ({exc})") from exc
    rows = list(csv.reader(lines))
    if not rows or [c.strip() for c in rows[0]] != ["speed_rad_s", "lead_deg"]:
        raise ProfileError(str(path), "header", rows[0] if rows else "<empty>",
                           "the header speed_rad_s,lead_deg")
    speeds, leads = [], []
    for k, row in enumerate(rows[1:], start=2):
        try:
            w, d = (float(c) for c in row)
        except ValueError:
            raise ProfileError(str(path), f"row {k}", row, "two numbers: speed_rad_s, lead_deg") from None
        if not (math.isfinite(w) and math.isfinite(d)) or (speeds and w <= speeds[-1]) or abs(d) > 180:
            raise ProfileError(str(path), f"row {k}", row,
                               "finite numbers, speeds strictly increasing, |lead| <= 180 deg")
        speeds.append(w)
        leads.append(d)
    if not speeds:
        raise ProfileError(str(path), "rows", 0, "at least one speed_rad_s,lead_deg row")
    return LeadModel("table", table_speed_rad_s=speeds, table_lead_deg=leads)

"""A live terminal view of a run: rpm, TSR, Cp gross and net, servo power, state, trips.

``watch(endpoint)`` subscribes to the operator interface's telemetry and redraws a plain-text
panel with ANSI cursor codes (no curses) until Ctrl-C, ``duration_s`` or, with ``once``, the
first live frame.  ``render(view)`` is the pure function that turns the collected state into
text.  Cp gross and net come from the per-revolution frames (whole revolutions, as the energy
ledger books them); the instantaneous Cp gross of the live frame is shown beside them.

:class:`TelemetrySubscriber` keeps the latest ``live`` frame only (a ``CONFLATE`` socket: a
slow terminal never falls behind) and every ``revolution`` frame (a plain queue).
"""
from __future__ import annotations

import logging
import math
import sys
import time
from collections.abc import Mapping
from pathlib import Path
from typing import Any, TextIO

import zmq

from .errors import ProfileError
from .keys import load_public_key, load_secret_key
from .opmsg import DEFAULT_TELEMETRY_ENDPOINT, OperatorMessageError, decode_telemetry

__all__ = ["TelemetrySubscriber", "new_view", "update_view", "render", "watch"]

log = logging.getLogger(__name__)

_CLEAR = "\x1b[H\x1b[J"         # cursor home, clear to the end of the screen
_STALE_S = 1.0                  # live data older than this is flagged
_MAX_TRIPS = 5


class TelemetrySubscriber:
    """Two SUB sockets on one telemetry endpoint: ``live`` conflated, ``revolution`` queued."""

    def __init__(self, endpoint: str, server_public_key: str | Path | bytes | None = None,
                 client_keys: str | Path | tuple[bytes, bytes] | None = None) -> None:
        self.endpoint = endpoint
        self.invalid = 0
        self._ctx = zmq.Context()
        self._socks: list[zmq.Socket] = []
        try:
            curve = None
            if server_public_key is not None or client_keys is not None:
                if server_public_key is None or client_keys is None:
                    raise ProfileError("telemetry subscriber", "client_keys", None,
                                       "given together with server_public_key (CURVE needs both)")
                keys = client_keys if isinstance(client_keys, tuple) else load_secret_key(client_keys)
                curve = (load_public_key(server_public_key), keys)
            for topic, conflate in ((b"live ", True), (b"revolution ", False)):
                sock = self._ctx.socket(zmq.SUB)
                sock.linger = 0
                if conflate:
                    sock.conflate = 1          # before connect; single-part frames only
                else:
                    sock.rcvhwm = 1000
                if curve is not None:
                    sock.curve_serverkey = curve[0]
                    sock.curve_publickey, sock.curve_secretkey = curve[1]
                sock.subscribe(topic)
                sock.connect(endpoint)
                self._socks.append(sock)
            self._poller = zmq.Poller()
            for sock in self._socks:
                self._poller.register(sock, zmq.POLLIN)
        except BaseException:
            self.close()
            raise

    def poll(self, timeout_ms: int, limit: int = 256) -> list[tuple[str, dict[str, Any]]]:
        """Wait up to ``timeout_ms`` for telemetry; return every valid frame waiting (at most
        ``limit``), as (topic, map).  Malformed frames are counted in ``invalid`` and skipped."""
        out: list[tuple[str, dict[str, Any]]] = []
        if not self._poller.poll(max(0, int(timeout_ms))):
            return out
        for sock in self._socks:
            for _ in range(limit):
                try:
                    frame = sock.recv(zmq.NOBLOCK)
                except zmq.Again:
                    break
                try:
                    out.append(decode_telemetry(frame))
                except OperatorMessageError as exc:
                    self.invalid += 1
                    log.debug("skipping a malformed telemetry frame: %s", exc)
        return out

    def close(self) -> None:
        for sock in self._socks:
            sock.close(linger=0)
        self._socks = []
        if not self._ctx.closed:
            self._ctx.term()

    def __enter__(self) -> "TelemetrySubscriber":
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


# --------------------------------------------------------------------------- the view
def new_view(endpoint: str) -> dict[str, Any]:
    """The state ``render`` draws: latest live frame, latest revolution, counts, trips."""
    return {"endpoint": endpoint, "live": None, "revolution": None, "revolutions": 0,
            "trips": [], "age_s": None, "invalid": 0}


def update_view(view: dict[str, Any], topic: str, message: Mapping[str, Any]) -> None:
    """Fold one telemetry message into ``view``."""
    if topic == "live":
        view["live"] = dict(message)
        trip = message.get("last_trip")
        if trip is not None:
            seen = view["trips"]
            key = (trip["t_s"], trip["reason"])
            if not any((t["t_s"], t["reason"]) == key for t in seen):
                seen.append(dict(trip))
                del seen[:-_MAX_TRIPS]
    elif topic == "revolution":
        view["revolution"] = dict(message)
        view["revolutions"] += 1


def _f(value: object, fmt: str) -> str:
    if not isinstance(value, (int, float)) or isinstance(value, bool):
        return "-"
    if math.isnan(value):
        return "nan"
    return format(value, fmt)


def render(view: Mapping[str, Any]) -> str:
    """The panel for ``view`` as plain text (no terminal codes); a pure function."""
    lines = [f"flapctl watch  {view.get('endpoint', '')}"]
    live = view.get("live")
    if live is None:
        lines.append("  waiting for telemetry ...")
    else:
        age = view.get("age_s")
        stale = f"   (no telemetry for {age:.1f} s)" if isinstance(age, (int, float)) and age > _STALE_S else ""
        lines += [
            f"  state {live['state']:<9} t = {_f(live['t_s'], '.3f')} s   tick {live['tick']}{stale}",
            f"  rotor {_f(live['rpm'], '8.2f')} rpm   TSR {_f(live['tsr'], '.3f')} "
            f"(set {_f(live['tsr_setpoint'], '.3f')})   flow {_f(live['flow_m_s'], '.3f')} m/s",
            f"  torque {_f(live['torque_nm'], '.4f')} N m   brake {_f(live['brake_nm'], '.4f')} N m   "
            f"Cp gross (inst) {_f(live['cp_gross_inst'], '.3f')}",
        ]
    rev = view.get("revolution")
    if rev is None:
        lines.append("  revolution: none closed yet")
    else:
        lines.append(
            f"  revolution #{rev['index']}: TSR {_f(rev['tsr'], '.3f')}   Cp gross {_f(rev['cp_gross'], '.4f')}"
            f"   Cp net {_f(rev['cp_net'], '.4f')}   shaft {_f(rev['shaft_power_w'], '.3f')} W"
            f"   actuators {_f(rev['actuator_power_w'], '.3f')} W")
    if live is not None:
        lines.append("  blade   flap cmd deg   flap meas deg   servo power W")
        cmd, meas, power = live["flap_cmd_deg"], live["flap_meas_deg"], live["servo_power_w"]
        for i in range(max(len(cmd), len(meas), len(power))):
            c = _f(cmd[i], "+9.3f") if i < len(cmd) else "-"
            m = _f(meas[i], "+9.3f") if i < len(meas) else "-"
            p = _f(power[i], "10.4f") if i < len(power) else "-"
            lines.append(f"  {i:>5}   {c:>12}   {m:>13}   {p:>13}")
    trips = view.get("trips") or []
    if trips:
        lines.append("  trips:")
        for trip in trips:
            lines.append(f"    t = {_f(trip['t_s'], '.3f')} s  {trip['reason']}: {trip['detail']}")
    else:
        lines.append("  trips: none")
    if view.get("invalid"):
        lines.append(f"  ({view['invalid']} malformed telemetry frames skipped)")
    return "\n".join(lines) + "\n"


def watch(endpoint: str = DEFAULT_TELEMETRY_ENDPOINT, duration_s: float | None = None,
          stream: TextIO = sys.stdout, once: bool = False, *,
          server_public_key: str | Path | bytes | None = None,
          client_keys: str | Path | tuple[bytes, bytes] | None = None,
          refresh_hz: float = 10.0) -> dict[str, Any]:
    """Show the live view until Ctrl-C or ``duration_s`` (wall seconds); return the last view.

    ``once``: draw once, as soon as the first live frame arrives (waiting at most ``duration_s``,
    5 s when None).  On a terminal the panel is redrawn in place at ``refresh_hz``; on anything
    else one plain panel is written per second.
    """
    limit = duration_s if duration_s is not None else (5.0 if once else math.inf)
    if isinstance(limit, bool) or not isinstance(limit, (int, float)) or math.isnan(limit) or limit < 0:
        raise ProfileError("watch", "duration_s", duration_s, "None or a time >= 0 s")
    tty = hasattr(stream, "isatty") and stream.isatty()
    redraw_s = 1.0 / refresh_hz if tty else 1.0
    view = new_view(endpoint)
    start = time.monotonic()
    last_live = None
    last_draw = -math.inf

    def draw() -> None:
        stream.write((_CLEAR if tty else "") + render(view) + ("" if tty else "\n"))
        stream.flush()

    sub = TelemetrySubscriber(endpoint, server_public_key, client_keys)
    try:
        while True:
            now = time.monotonic()
            remaining = start + limit - now
            if remaining <= 0.0:
                break
            for topic, msg in sub.poll(int(min(remaining, redraw_s) * 1000)):
                update_view(view, topic, msg)
                if topic == "live":
                    last_live = time.monotonic()
            now = time.monotonic()
            view["invalid"] = sub.invalid
            view["age_s"] = None if last_live is None else now - last_live
            if once:
                if view["live"] is not None:
                    break
                continue
            if now - last_draw >= redraw_s:
                draw()
                last_draw = now
    except KeyboardInterrupt:
        pass
    finally:
        sub.close()
    if once or last_draw == -math.inf:
        draw()
    return view

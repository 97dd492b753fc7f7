"""The run log: one HDF5 file per run, written in chunks while the run goes on.

Layout (all units in the field names)::

    /ticks         compound table, one row per tick (see tick_dtype)
    /revolutions   compound table, one row per whole revolution (energy ledger)
    /events        compound table: time, kind, text (state transitions, trips, warnings)
    attrs          format, software version, start time, profile and schedule text, command line

Rows are buffered and appended ``chunk_rows`` at a time (an append costs about the same for one
row as for a thousand), then the file is flushed, so a crash or ``kill -9`` loses at most the
rows since the last flush.  The file is created with mode ``x``: an existing file is never
overwritten.  Write errors (disk full, removed medium) raise :class:`RunLogError` so the
controller can go to the safe state; rows already flushed stay readable.
"""
from __future__ import annotations

import datetime as _dt
import json
import logging
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import h5py
import numpy as np

from . import __version__
from .errors import RunLogError

__all__ = ["LOG_FORMAT", "tick_dtype", "revolution_dtype", "RunLog", "RunData", "open_run"]

log = logging.getLogger(__name__)
LOG_FORMAT = "flapctl-runlog-1"
EVENT_DTYPE = np.dtype([("t_s", "f8"), ("kind", h5py.string_dtype()), ("text", h5py.string_dtype())])


def tick_dtype(blades: int) -> np.dtype:
    """The per-tick row: scalars, then per-blade arrays of length ``blades``.

    Time, counts and azimuth keep double precision; the other measurements are single precision
    (7 significant digits, far below any sensor's resolution), which halves the log's size.
    ``thrust_n`` is NaN when the rig has no streamwise load cell.
    """
    return np.dtype([
        ("t_s", "f8"), ("counts", "i8"), ("azimuth_deg", "f8"), ("speed_rad_s", "f4"),
        ("tsr", "f4"), ("flow_m_s", "f4"), ("torque_nm", "f4"), ("thrust_n", "f4"),
        ("brake_nm", "f4"), ("state", "u1"), ("flap_cmd_deg", "f4", (blades,)),
        ("flap_deg", "f4", (blades,)), ("servo_power_w", "f4", (blades,)),
        ("lateness_us", "f4"), ("compute_us", "f4"),
    ])


def revolution_dtype(blades: int) -> np.dtype:
    return np.dtype([
        ("index", "i8"), ("t_start_s", "f8"), ("duration_s", "f8"), ("mean_speed_rad_s", "f8"),
        ("mean_tsr", "f8"), ("mean_flow_m_s", "f8"), ("shaft_energy_j", "f8"),
        ("servo_energy_j", "f8", (blades,)), ("fluid_energy_j", "f8"), ("cp_gross", "f8"),
        ("cp_net", "f8"),
    ])


class RunLog:
    """Chunked, flushed HDF5 writer for one run."""

    def __init__(self, path: str | Path, blades: int, metadata: dict[str, Any],
                 chunk_rows: int = 1000) -> None:
        self.path = Path(path)
        self.blades = blades
        self.chunk_rows = max(1, int(chunk_rows))
        self._tick_dtype = tick_dtype(blades)
        self._rev_dtype = revolution_dtype(blades)
        self._ticks: list[tuple] = []
        self._revs: list[tuple] = []
        self._events: list[tuple] = []
        self.rows_written = 0
        self.closed = False
        if self.path.exists():
            raise RunLogError(f"{self.path}: run log exists already; flapctl never overwrites a log "
                              "(choose another --out)")
        try:
            self.path.parent.mkdir(parents=True, exist_ok=True)
            self._f = h5py.File(self.path, "x")
        except (OSError, ValueError) as exc:
            raise RunLogError(f"{self.path}: cannot create the run log ({exc})") from exc
        try:
            f = self._f
            f.attrs["format"] = LOG_FORMAT
            f.attrs["software_version"] = __version__
            f.attrs["start_time_utc"] = _dt.datetime.now(_dt.timezone.utc).isoformat()
            f.attrs["blades"] = blades
            for key, value in metadata.items():
                f.attrs[key] = value if isinstance(value, (str, int, float)) else json.dumps(value)
            for name, dt in (("ticks", self._tick_dtype), ("revolutions", self._rev_dtype),
                             ("events", EVENT_DTYPE)):
                f.create_dataset(name, shape=(0,), maxshape=(None,), dtype=dt,
                                 chunks=(self.chunk_rows if name == "ticks" else 64,))
            f.flush()
        except (OSError, ValueError) as exc:
            self._f.close()
            raise RunLogError(f"{self.path}: cannot write the run log header ({exc})") from exc

    # -- appending (cheap: list appends) ------------------------------------------------------
    def append_tick(self, row: tuple) -> None:
        self._ticks.append(row)
        if len(self._ticks) >= self.chunk_rows:
            self.flush()

    def append_revolution(self, rec) -> None:
        self._revs.append((rec.index, rec.t_start_s, rec.duration_s, rec.mean_speed_rad_s,
                           rec.mean_tsr, rec.mean_flow_m_s, rec.shaft_energy_j, rec.servo_energy_j,
                           rec.fluid_energy_j, rec.cp_gross, rec.cp_net))

    def event(self, t_s: float, kind: str, text: str) -> None:
        self._events.append((t_s, kind, text))
        log.info("t=%.3f s %s: %s", t_s, kind, text)

    # -- writing ------------------------------------------------------------------------------
    def _append(self, name: str, rows: list[tuple], dtype: np.dtype) -> None:
        if not rows:
            return
        data = np.array(rows, dtype=dtype)
        ds = self._f[name]
        n = ds.shape[0]
        ds.resize((n + len(data),))
        ds[n:] = data

    def flush(self) -> None:
        """Append everything buffered and flush the file to disk."""
        if self.closed:
            return
        ticks, revs, events = self._ticks, self._revs, self._events
        self._ticks, self._revs, self._events = [], [], []
        try:
            self._append("ticks", ticks, self._tick_dtype)
            self._append("revolutions", revs, self._rev_dtype)
            self._append("events", events, EVENT_DTYPE)
            self._f.flush()
        except Exception as exc:  # any failure of the writer means the log is at risk
            raise RunLogError(f"{self.path}: writing the run log failed ({exc}); "
                              f"{self.rows_written} tick rows are safe on disk") from exc
        self.rows_written += len(ticks)

    def set_summary(self, summary: dict[str, Any]) -> None:
        self._f.attrs["summary"] = json.dumps(summary)

    def close(self) -> None:
        if self.closed:
            return
        try:
            self.flush()
        finally:
            self.closed = True
            try:
                self._f.close()
            except (OSError, ValueError):
                log.exception("closing %s failed", self.path)


@dataclass
class RunData:
    """A run log read back."""
    path: Path
    ticks: np.ndarray
    revolutions: np.ndarray
    events: np.ndarray
    attrs: dict[str, Any]

    @property
    def summary(self) -> dict[str, Any]:
        raw = self.attrs.get("summary")
        return json.loads(raw) if raw else {}


def open_run(path: str | Path) -> RunData:
    """Read a whole run log (also one whose writer was killed: flushed rows are all there)."""
    path = Path(path)
    try:
        with h5py.File(path, "r") as f:
            if f.attrs.get("format") != LOG_FORMAT:
                raise RunLogError(f"{path}: not a flapctl run log (format {f.attrs.get('format')!r})")
            attrs = {k: (v.decode() if isinstance(v, bytes) else v) for k, v in f.attrs.items()}
            return RunData(path, f["ticks"][:], f["revolutions"][:], f["events"][:], attrs)
    except OSError as exc:
        raise RunLogError(f"{path}: cannot read the run log ({exc})") from exc

"""The run log written by a separate process, so the real-time loop never calls h5py.

:class:`ProcessRunLog` has the interface of :class:`flapctl.runlog.RunLog` (``append_tick``,
``append_revolution``, ``event``, ``flush``, ``set_summary``, ``close``, ``rows_written``,
``path``).  A writer process (``spawn`` context, so it shares nothing with the loop) feeds what
it receives to a :class:`~flapctl.runlog.RunLog`, which appends and flushes the file after
every batch.

The loop's side is built to cost the same small amount every tick:

* an append pickles the row onto the current chunk's buffer (about 1.5 us).  Pickling a whole
  chunk at once is cheaper in total, but with the caches cold between paced ticks it cost
  300-800 us in a single tick, more than a 5 kHz period;
* every ``chunk_rows`` rows (or once the buffer is ``flush_interval_s`` old) the buffer is swapped
  for a fresh one and sent with one ``send_bytes`` -- at most one send per chunk, no pickling;
* the writer acknowledges through shared memory (rows flushed, batches done, error flag), so the
  loop learns how far the writer is by reading two integers instead of polling the pipe.

A batch is a stream of pickles: a tuple is a tick row; a list is a tagged record
(``["rev", record]``, ``["event", t_s, kind, text]``, ``["summary", dict]``, ``["close"]``).
A reader thread in the writer keeps the pipe drained, so a send does not wait for HDF5.

Failures (the controller turns a RunLogError into the safe state):

* the file exists already -> :class:`RunLogError` at once, in the loop's process, before anything
  is started (a log is never overwritten); the writer cannot create it -> RunLogError from the
  constructor with the writer's reason;
* the writer reports a write error, or dies -> the next send (the append that completes a
  chunk) or the next ``flush``/``close`` raises RunLogError naming the file and the rows known to
  be on disk;
* the writer falls more than ``max_backlog`` batches behind -> RunLogError rather than unbounded
  memory.

The writer ignores SIGINT: Ctrl-C reaches the controller, which stops, goes safe and closes the
log, and the writer writes everything it was sent before it exits.

The ``spawn`` context starts a fresh interpreter that imports the main module again: a script
that creates a ProcessRunLog must keep its top level under ``if __name__ == "__main__":``
(the ``flapctl`` command and ``python -m`` entry points do).
"""
from __future__ import annotations

import io
import logging
import multiprocessing
import os
import pickle
import queue
import signal
import threading
import time
from pathlib import Path
from typing import Any

from .errors import RunLogError
from .runlog import RunLog

__all__ = ["ProcessRunLog"]

log = logging.getLogger(__name__)
_dumps = pickle.dumps
_PROTOCOL = 5
# slots of the shared acknowledgement array
_ROWS, _BATCHES, _FAILED = 0, 1, 2


# -- the writer process ------------------------------------------------------------------------
def _pump(conn, inbox: queue.SimpleQueue) -> None:
    """Writer-side reader thread: move every batch from the pipe to ``inbox`` at once."""
    try:
        while True:
            inbox.put(conn.recv_bytes())
    except (EOFError, OSError):
        inbox.put(None)


def _items(blob: bytes):
    """The records of one batch, in order: consecutive pickles."""
    unpickler = pickle.Unpickler(io.BytesIO(blob))
    while True:
        try:
            yield unpickler.load()
        except EOFError:
            return


def _apply(runlog: RunLog, path: str, item: list) -> bool:
    """Carry out one tagged record; True when it was ``close``."""
    tag = item[0]
    if tag == "rev":
        runlog.append_revolution(item[1])
    elif tag == "event":
        runlog.event(item[1], item[2], item[3])
    elif tag == "summary":
        try:
            runlog.set_summary(item[1])
        except Exception as exc:  # h5py raises several types; all mean the summary is lost
            raise RunLogError(f"{path}: writing the run summary failed ({exc})") from exc
    elif tag == "close":
        return True
    else:
        raise RunLogError(f"{path}: the run log writer received an unknown record {tag!r}")
    return False


def _writer_main(conn, acks, path: str, blades: int, metadata: dict[str, Any],
                 chunk_rows: int) -> None:
    """Entry point of the writer process."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    try:
        runlog = RunLog(path, blades, metadata, chunk_rows=chunk_rows)
    except RunLogError as exc:
        conn.send(("error", str(exc)))
        return
    conn.send(("ready", os.getpid()))
    inbox: queue.SimpleQueue = queue.SimpleQueue()
    threading.Thread(target=_pump, args=(conn, inbox), name="runlog-pump", daemon=True).start()
    try:
        while True:
            blob = inbox.get()
            if blob is None:             # the controller's process is gone: keep what arrived
                runlog.close()
                return
            closing = False
            for item in _items(blob):
                if type(item) is tuple:
                    runlog.append_tick(item)
                elif _apply(runlog, path, item):
                    closing = True
            if closing:
                runlog.close()
            else:
                runlog.flush()
            acks[_ROWS] = runlog.rows_written
            acks[_BATCHES] += 1
            if closing:
                conn.send(("closed", runlog.rows_written))
                return
    except (RunLogError, pickle.UnpicklingError) as exc:
        acks[_FAILED] = 1
        try:
            conn.send(("error", str(exc)))
        except OSError:
            pass
        try:
            runlog.close()
        except RunLogError:
            pass


# -- the loop's side -----------------------------------------------------------------------------
class ProcessRunLog:
    """RunLog interface; the HDF5 work happens in a writer process fed through a pipe.

    ``chunk_rows``: tick rows per batch sent (also the HDF5 chunk size).  ``flush_interval_s``:
    a partly filled batch is sent once it is this old (checked on append).  ``max_backlog``:
    batches sent but not yet written before appends fail.  ``start_timeout_s`` and
    ``close_timeout_s`` bound the waits for the writer at start and at flush/close.
    """

    def __init__(self, path: str | Path, blades: int, metadata: dict[str, Any],
                 chunk_rows: int = 250, *, flush_interval_s: float = 1.0, max_backlog: int = 40,
                 start_timeout_s: float = 60.0, close_timeout_s: float = 60.0,
                 context: str = "spawn") -> None:
        self.path = Path(path)
        self.blades = blades
        self.chunk_rows = max(1, int(chunk_rows))
        self.closed = False
        self.rows_sent = 0
        self._batches_sent = 0
        self._error: str | None = None
        self._buf = bytearray()
        self._nrows = 0
        self._interval_ns = int(flush_interval_s * 1e9)
        self._max_backlog = max(1, int(max_backlog))
        self._close_timeout_s = close_timeout_s
        if self.path.exists():
            raise RunLogError(f"{self.path}: run log exists already; "
                              "flapctl never overwrites a log "
                              "(choose another --out)")
        ctx = multiprocessing.get_context(context)
        self._acks = ctx.RawArray("q", 3)
        self._conn, child = ctx.Pipe(duplex=True)
        self._proc = ctx.Process(target=_writer_main, name="flapctl-runlog-writer", daemon=True,
                                 args=(child, self._acks, str(self.path), blades, dict(metadata),
                                       self.chunk_rows))
        self._proc.start()
        child.close()
        self.writer_pid: int | None = self._proc.pid
        try:
            reply = self._receive(start_timeout_s, "start")
        except RunLogError:
            self._stop_writer()
            raise
        if reply[0] != "ready":
            self._stop_writer()
            raise RunLogError(reply[1] if reply[0] == "error" else
                              f"{self.path}: the run log writer answered {reply!r} at start")
        self._last_send_ns = time.monotonic_ns()

    # -- appending (the hot path) ------------------------------------------------------------------
    def append_tick(self, row: tuple) -> None:
        self._buf += _dumps(row, _PROTOCOL)
        self._nrows += 1
        if (self._nrows >= self.chunk_rows
                or time.monotonic_ns() - self._last_send_ns >= self._interval_ns):
            self._send_batch()

    def append_revolution(self, rec) -> None:
        self._buf += _dumps(["rev", rec], _PROTOCOL)

    def event(self, t_s: float, kind: str, text: str) -> None:
        self._buf += _dumps(["event", t_s, kind, text], _PROTOCOL)
        log.info("t=%.3f s %s: %s", t_s, kind, text)

    @property
    def rows_written(self) -> int:
        """Tick rows the writer has flushed to disk."""
        return self._acks[_ROWS]

    # -- talking to the writer ------------------------------------------------------------------
    def _fail(self, why: str) -> RunLogError:
        if self._error is None:
            self._error = why
        return RunLogError(f"{self.path}: {self._error}; {self.rows_written} tick rows are safe "
                           "on disk")

    def _writer_error(self) -> RunLogError:
        """The writer set its error flag: fetch its reason (it sent it before exiting)."""
        reason = "no reason given"
        try:
            if self._conn.poll(2.0):
                msg = self._conn.recv()
                if msg[0] == "error":
                    reason = msg[1]
        except (EOFError, OSError):
            pass
        return self._fail(f"the run log writer failed ({reason})")

    def _check(self) -> None:
        """Raise if the log has failed; reads shared memory only (no system call)."""
        if self._error is not None:
            raise self._fail(self._error)
        if self._acks[_FAILED]:
            raise self._writer_error()

    def _receive(self, timeout_s: float, what: str) -> tuple:
        try:
            if not self._conn.poll(timeout_s):
                raise self._fail(f"the run log writer did not answer within {timeout_s:g} s "
                                 f"({what})")
            return self._conn.recv()
        except (EOFError, OSError):
            raise self._fail(f"the run log writer process died ({self._exit_text()})") from None

    def _exit_text(self) -> str:
        self._proc.join(timeout=1.0)
        code = self._proc.exitcode
        if code is None:
            return "its pipe closed"
        return f"exit code {code}" if code >= 0 else f"killed by signal {-code}"

    def _send_batch(self) -> None:
        self._check()
        backlog = self._batches_sent - self._acks[_BATCHES]
        if backlog >= self._max_backlog:
            raise self._fail(f"the run log writer is {backlog} batches behind")
        blob, nrows = self._buf, self._nrows
        self._buf, self._nrows = bytearray(), 0
        self._last_send_ns = time.monotonic_ns()
        try:
            self._conn.send_bytes(blob)
        except (OSError, ValueError):
            if self._acks[_FAILED]:
                raise self._writer_error() from None
            raise self._fail(f"the run log writer process died ({self._exit_text()})") from None
        self._batches_sent += 1
        self.rows_sent += nrows

    def _wait_written(self, what: str) -> None:
        """Block until the writer has done every batch sent (bounded by close_timeout_s)."""
        deadline = time.monotonic() + self._close_timeout_s
        acks = self._acks
        while acks[_BATCHES] < self._batches_sent:
            self._check()
            left = deadline - time.monotonic()
            if left <= 0:
                raise self._fail(f"the run log writer did not finish within "
                                 f"{self._close_timeout_s:g} s ({what})")
            try:
                if self._conn.poll(min(left, 0.01)):
                    msg = self._conn.recv()
                    if msg[0] == "error":
                        raise self._fail(f"the run log writer failed ({msg[1]})")
            except (EOFError, OSError):
                if acks[_BATCHES] >= self._batches_sent:
                    return
                raise self._fail(f"the run log writer process died ({self._exit_text()})") from None

    # -- off the hot path ------------------------------------------------------------------------
    def flush(self) -> None:
        """Send everything buffered and wait until the writer has it on disk."""
        if self.closed:
            return
        if self._buf:
            self._send_batch()
        else:
            self._check()
            if not self._proc.is_alive():
                raise self._fail(f"the run log writer process died ({self._exit_text()})")
        self._wait_written("flush")

    def set_summary(self, summary: dict[str, Any]) -> None:
        """Store the run summary (sent with the next batch)."""
        self._check()
        self._buf += _dumps(["summary", summary], _PROTOCOL)

    def close(self) -> None:
        """Write everything, close the file and end the writer; idempotent."""
        if self.closed:
            return
        self.closed = True
        try:
            if self._error is None and not self._acks[_FAILED]:
                self._buf += _dumps(["close"], _PROTOCOL)
                self._send_batch()
                self._wait_written("close")
            elif self._error is None:
                raise self._writer_error()
        finally:
            self._stop_writer()

    def _stop_writer(self) -> None:
        proc = self._proc
        proc.join(timeout=self._close_timeout_s if self._error is None else 2.0)
        if proc.is_alive():
            log.error("%s: the run log writer did not exit; terminating it", self.path)
            proc.terminate()
            proc.join(timeout=5.0)
        self._conn.close()

    def __enter__(self) -> "ProcessRunLog":
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

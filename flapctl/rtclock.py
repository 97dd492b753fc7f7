"""The real-time clock: wall-clock pacing, absolute deadlines, lateness counted, overruns tripped.

Deadlines are absolute, in integer ``time.monotonic_ns()``: tick k is due at ``t0 + k * period``
(``due += period``), so one late tick never shifts the later ones; after a stall the following
ticks run back to back until the loop is on its original grid again.  ``wait()`` sleeps until
``spin_margin_ns`` before the deadline and spins the rest of the way (``time.sleep`` alone wakes
tens of microseconds late); the margin scales with the period because spinning flat out under
SCHED_FIFO is throttled by the kernel (``sched_rt_runtime_us``).

Lateness of a tick = the time ``wait()`` returned minus the tick's deadline (ns, >= 0).
A tick more than half a period late counts as *late*; more than a whole period late, as an
*overrun*.  :class:`OverrunPolicy` logs warnings (at most one a second) and, after
``trip_after_consecutive`` overruns in a row, ``wait()`` raises
:class:`~flapctl.errors.SafetyTrip` ``("loop_overrun", ...)`` so the controller goes safe.

Opt-in real-time knobs (:class:`RealtimeOptions`, applied by :func:`apply_realtime` when the
clock starts, undone by :func:`restore_realtime` when it closes): SCHED_FIFO priority (with
SCHED_RESET_ON_FORK, so processes started later do not inherit it), CPU affinity, ``mlockall``,
timer slack and a frozen, disabled garbage collector.  A knob that is not permitted falls back
with a message; none of them ever raises.
"""
from __future__ import annotations

import ctypes
import ctypes.util
import gc
import logging
import math
import os
import time
from array import array
from collections.abc import Callable
from dataclasses import dataclass, field

from .clock import Clock
from .errors import ProfileError, SafetyTrip

__all__ = [
    "NsHistogram", "OverrunPolicy", "RealtimeOptions", "RealtimeState", "RealtimeClock",
    "default_spin_margin_ns", "apply_realtime", "restore_realtime",
]

log = logging.getLogger(__name__)

# Linux generic values (x86, arm, riscv); <sys/mman.h>, <linux/prctl.h>
_MCL_CURRENT = 1
_MCL_FUTURE = 2
_PR_SET_TIMERSLACK = 29
_PR_GET_TIMERSLACK = 30
_RT_RUNTIME = "/proc/sys/kernel/sched_rt_runtime_us"


# -- histogram -----------------------------------------------------------------------------------
class NsHistogram:
    """Fixed-bin histogram of durations in ns, preallocated once.

    Bins: 1 us wide up to 2 ms, 50 us wide up to 102 ms, 5 ms wide up to 10.102 s, then one
    overflow bin.  ``add`` only increments a counter (no structure grows per value); a quantile
    is the upper edge of the bin that holds it (so at most one bin width high, never above the
    exact maximum, which is kept).
    """

    _TIERS = ((0, 1_000), (2_000_000, 50_000), (102_000_000, 5_000_000))   # (start, width) ns
    _OVERFLOW = 6000          # 2000 bins per tier

    def __init__(self) -> None:
        self._bins = array("q", bytes(8 * (self._OVERFLOW + 1)))
        self.count = 0
        self.max_ns = 0
        self.total_ns = 0

    def add(self, value_ns: int) -> None:
        if value_ns < 0:
            value_ns = 0
        if value_ns < 2_000_000:
            i = value_ns // 1_000
        elif value_ns < 102_000_000:
            i = 2000 + (value_ns - 2_000_000) // 50_000
        elif value_ns < 10_102_000_000:
            i = 4000 + (value_ns - 102_000_000) // 5_000_000
        else:
            i = 6000
        self._bins[i] += 1
        self.count += 1
        self.total_ns += value_ns
        if value_ns > self.max_ns:
            self.max_ns = value_ns

    def clear(self) -> None:
        self._bins[:] = array("q", bytes(8 * len(self._bins)))
        self.count = self.max_ns = self.total_ns = 0

    def _upper_ns(self, i: int) -> int:
        if i >= self._OVERFLOW:
            return self.max_ns
        start, width = self._TIERS[i // 2000]
        return start + (i % 2000 + 1) * width

    def quantile_ns(self, q: float) -> int:
        """Upper bin edge below which a fraction ``q`` (0..1) of the values lie (0 when empty)."""
        if self.count == 0:
            return 0
        need = max(1, math.ceil(q * self.count - 1e-9))
        seen = 0
        for i, c in enumerate(self._bins):
            seen += c
            if seen >= need:
                return min(self._upper_ns(i), self.max_ns)
        return self.max_ns

    @property
    def mean_ns(self) -> float:
        return self.total_ns / self.count if self.count else 0.0


# -- overrun policy --------------------------------------------------------------------------------
@dataclass(frozen=True, kw_only=True)
class OverrunPolicy:
    """What to do about overruns (ticks that start more than one period late).

    ``warn_after``: log a warning once this many overruns have been counted, then at most once a
    second (``None``: never warn).  ``trip_after_consecutive``: raise ``SafetyTrip("loop_overrun")``
    from ``wait()`` after this many overruns in a row (``None``: never trip).
    """

    warn_after: int | None = 1
    trip_after_consecutive: int | None = 10
    source: str = "<overrun policy>"

    def __post_init__(self) -> None:
        for key in ("warn_after", "trip_after_consecutive"):
            value = getattr(self, key)
            if value is not None and (isinstance(value, bool) or not isinstance(value, int)
                                      or value < 1):
                raise ProfileError(self.source, key, value, "an integer >= 1 or None")


# -- real-time knobs -------------------------------------------------------------------------------
@dataclass(frozen=True, kw_only=True)
class RealtimeOptions:
    """Opt-in real-time settings of the controller process.

    ``fifo_priority``: SCHED_FIFO priority 1..99 (None: stay SCHED_OTHER).  ``cpu``: pin the loop
    to this CPU (None: leave the affinity).  ``mlockall``: lock current and future memory.
    ``freeze_gc``: collect, freeze and disable the cyclic garbage collector for the run.
    ``timer_slack_ns``: the thread's timer slack (None: leave it; default 1 ns, down from 50 us).
    """

    fifo_priority: int | None = None
    cpu: int | None = None
    mlockall: bool = False
    freeze_gc: bool = False
    timer_slack_ns: int | None = 1
    source: str = "<realtime options>"

    def __post_init__(self) -> None:
        def bad(key: str, expected: str) -> ProfileError:
            return ProfileError(self.source, key, getattr(self, key), expected)

        def is_int(v: object) -> bool:
            return isinstance(v, int) and not isinstance(v, bool)

        p = self.fifo_priority
        if p is not None and (not is_int(p) or not 1 <= p <= 99):
            raise bad("fifo_priority", "an integer 1..99 (SCHED_FIFO priority) or None")
        if self.cpu is not None and (not is_int(self.cpu) or self.cpu < 0):
            raise bad("cpu", "a CPU number >= 0 or None")
        if not isinstance(self.mlockall, bool):
            raise bad("mlockall", "true or false")
        if not isinstance(self.freeze_gc, bool):
            raise bad("freeze_gc", "true or false")
        s = self.timer_slack_ns
        if s is not None and (not is_int(s) or s < 1):
            raise bad("timer_slack_ns", "an integer >= 1 (ns) or None")


@dataclass
class RealtimeState:
    """What :func:`apply_realtime` changed, so that :func:`restore_realtime` can undo it."""

    policy: int | None = None
    priority: int | None = None
    affinity: set[int] | None = None
    locked: bool = False
    timer_slack_ns: int | None = None
    gc_was_enabled: bool | None = None
    messages: list[str] = field(default_factory=list)


_LIBC: list[ctypes.CDLL | None] = []


def _libc() -> ctypes.CDLL | None:
    """The C library of this process (loaded once; None when it cannot be found)."""
    if not _LIBC:
        lib = None
        for name in (None, "libc.so.6", "find"):
            if name == "find":
                name = ctypes.util.find_library("c")
                if name is None:
                    break
            try:
                lib = ctypes.CDLL(name, use_errno=True)
                lib.prctl, lib.mlockall, lib.munlockall     # all three must exist
                break
            except (OSError, AttributeError):
                lib = None
        _LIBC.append(lib)
    return _LIBC[0]


def _errno_text() -> str:
    err = ctypes.get_errno()
    return f"{os.strerror(err)} (errno {err})"


def _apply_fifo(priority: int, state: RealtimeState) -> str:
    if not hasattr(os, "sched_setscheduler"):
        return f"SCHED_FIFO {priority}: not available on this platform; staying SCHED_OTHER"
    try:
        old_policy = os.sched_getscheduler(0)
        old_priority = os.sched_getparam(0).sched_priority
        os.sched_setscheduler(0, os.SCHED_FIFO | getattr(os, "SCHED_RESET_ON_FORK", 0),
                              os.sched_param(priority))
    except PermissionError as exc:
        return (f"SCHED_FIFO {priority}: not permitted ({exc.strerror}; needs root or "
                "CAP_SYS_NICE / RLIMIT_RTPRIO); staying SCHED_OTHER")
    except OSError as exc:
        return f"SCHED_FIFO {priority}: failed ({exc.strerror or exc}); staying SCHED_OTHER"
    state.policy, state.priority = old_policy, old_priority
    msg = f"SCHED_FIFO priority {priority} set (reset on fork)"
    try:
        with open(_RT_RUNTIME, encoding="ascii") as fh:
            runtime = int(fh.read().strip())
        if runtime >= 0:
            msg += f"; RT throttling allows {runtime} us of each second"
    except (OSError, ValueError):
        pass
    return msg


def _apply_cpu(cpu: int, state: RealtimeState) -> str:
    if not hasattr(os, "sched_setaffinity"):
        return f"cpu {cpu}: affinity not available on this platform; unchanged"
    try:
        old = os.sched_getaffinity(0)
        os.sched_setaffinity(0, {cpu})
    except PermissionError as exc:
        return f"cpu {cpu}: pinning not permitted ({exc.strerror}); affinity unchanged"
    except (OSError, ValueError, OverflowError) as exc:
        have = sorted(os.sched_getaffinity(0))
        why = getattr(exc, "strerror", None) or str(exc)
        return f"cpu {cpu}: cannot pin ({why}; usable CPUs {have}); affinity unchanged"
    state.affinity = old
    return f"pinned to cpu {cpu} (was {sorted(old)})"


def _apply_mlock(state: RealtimeState) -> str:
    libc = _libc()
    if libc is None:
        return "mlockall: libc not found; memory not locked"
    if libc.mlockall(_MCL_CURRENT | _MCL_FUTURE) != 0:
        return (f"mlockall: failed ({_errno_text()}; needs root or a large RLIMIT_MEMLOCK); "
                "not locked")
    state.locked = True
    return "memory locked (mlockall MCL_CURRENT|MCL_FUTURE)"


def _apply_slack(slack_ns: int, state: RealtimeState) -> str:
    libc = _libc()
    if libc is None:
        return "timer slack: libc not found; unchanged"
    old = libc.prctl(_PR_GET_TIMERSLACK, 0, 0, 0, 0)
    if libc.prctl(_PR_SET_TIMERSLACK, ctypes.c_ulong(slack_ns), 0, 0, 0) != 0:
        return f"timer slack {slack_ns} ns: prctl failed ({_errno_text()}); unchanged"
    state.timer_slack_ns = old if old > 0 else None
    return f"timer slack {slack_ns} ns (was {old} ns)"


def _apply_gc(state: RealtimeState) -> str:
    state.gc_was_enabled = gc.isenabled()
    gc.collect()
    gc.freeze()
    gc.disable()
    return f"garbage collector frozen ({gc.get_freeze_count()} objects) and disabled for the run"


def apply_realtime(options: RealtimeOptions, state: RealtimeState | None = None) -> list[str]:
    """Apply the real-time knobs to the calling process/thread; return one message per knob.

    Never raises for a knob that is not permitted or not available: the message says what
    happened and the knob stays as it was.  When ``state`` is given it records what changed
    (for :func:`restore_realtime`).  Apply after starting helper processes and threads.
    """
    state = state if state is not None else RealtimeState()
    messages: list[str] = []
    if options.timer_slack_ns is not None:
        messages.append(_apply_slack(options.timer_slack_ns, state))
    if options.cpu is not None:
        messages.append(_apply_cpu(options.cpu, state))
    if options.mlockall:
        messages.append(_apply_mlock(state))
    if options.freeze_gc:
        messages.append(_apply_gc(state))
    if options.fifo_priority is not None:
        messages.append(_apply_fifo(options.fifo_priority, state))
    for m in messages:
        log.info("real time: %s", m)
    state.messages.extend(messages)
    return messages


def restore_realtime(state: RealtimeState) -> list[str]:
    """Undo what :func:`apply_realtime` recorded in ``state``; return messages; never raises."""
    messages: list[str] = []
    if state.policy is not None:
        try:
            os.sched_setscheduler(0, state.policy, os.sched_param(state.priority or 0))
            messages.append("scheduling policy restored")
        except OSError as exc:
            messages.append(f"restoring the scheduling policy failed ({exc})")
        state.policy = state.priority = None
    if state.gc_was_enabled is not None:
        gc.unfreeze()
        if state.gc_was_enabled:
            gc.enable()
        gc.collect()
        messages.append("garbage collector unfrozen"
                        + (" and enabled" if state.gc_was_enabled else ""))
        state.gc_was_enabled = None
    if state.locked:
        libc = _libc()
        if libc is not None and libc.munlockall() == 0:
            messages.append("memory unlocked")
        else:
            messages.append(f"munlockall failed ({_errno_text()})")
        state.locked = False
    if state.affinity is not None:
        try:
            os.sched_setaffinity(0, state.affinity)
            messages.append(f"affinity restored to {sorted(state.affinity)}")
        except OSError as exc:
            messages.append(f"restoring the affinity failed ({exc})")
        state.affinity = None
    if state.timer_slack_ns is not None:
        libc = _libc()
        if libc is not None:
            libc.prctl(_PR_SET_TIMERSLACK, ctypes.c_ulong(state.timer_slack_ns), 0, 0, 0)
            messages.append(f"timer slack restored to {state.timer_slack_ns} ns")
        state.timer_slack_ns = None
    for m in messages:
        log.info("real time: %s", m)
    return messages


# -- the clock -------------------------------------------------------------------------------------
def default_spin_margin_ns(period_ns: int) -> int:
    """Spin margin for a period: 150 us at >= 1 ms, 50 us at <= 500 us, linear between,
    never more than 20 % of the period (common practice on these machines, PITFALLS.md)."""
    if period_ns >= 1_000_000:
        margin = 150_000
    elif period_ns <= 500_000:
        margin = 50_000
    else:
        margin = 50_000 + (period_ns - 500_000) * 100_000 // 500_000
    return min(margin, period_ns // 5)


class RealtimeClock(Clock):
    """Wall-clock pacing with absolute deadlines in integer ``time.monotonic_ns()``.

    ``wait()`` returns the tick's deadline in ns since ``start()``; ``lateness_ns`` is how late it
    actually returned and ``wake_ns`` the ``time.monotonic_ns()`` at which it did.  ``options``
    are applied in ``start()`` and undone in ``close()``; ``messages`` says what applying them
    did, ``restore_messages`` what undoing them did.
    ``plant_step(dt_s)``, when given, is called right after each wake-up (paced SIL: the model
    advances one period before the controller's tick); its cost is tick time, not lateness.
    """

    def __init__(self, period_ns: int, *, spin_margin_ns: int | None = None,
                 policy: OverrunPolicy | None = None, options: RealtimeOptions | None = None,
                 plant_step: Callable[[float], None] | None = None) -> None:
        super().__init__(period_ns)
        self._plant_step = plant_step
        if spin_margin_ns is None:
            spin_margin_ns = default_spin_margin_ns(self.period_ns)
        if isinstance(spin_margin_ns, bool) or not isinstance(spin_margin_ns, int) or not (
                0 <= spin_margin_ns <= self.period_ns):
            raise ProfileError("<realtime clock>", "spin_margin_ns", spin_margin_ns,
                               f"an integer 0..{self.period_ns} (the period, ns)")
        self.spin_margin_ns = spin_margin_ns
        self.policy = policy if policy is not None else OverrunPolicy()
        self.options = options
        self.messages: list[str] = []
        self.restore_messages: list[str] = []
        self.histogram = NsHistogram()
        self.late = 0
        self.consecutive_overruns = 0
        self.max_consecutive_overruns = 0
        self.t0_ns = 0
        self.due_ns = 0
        self.wake_ns = 0
        self._late_limit = self.period_ns // 2
        self._state = RealtimeState()
        self._applied = False
        self._last_warning_ns = 0
        self._warned_overruns = 0
        self._started = False

    def start(self) -> int:
        if self.options is not None and not self._applied:
            self.messages.extend(apply_realtime(self.options, self._state))
            self._applied = True
        self.ticks = 0
        self.late = self.overruns = 0
        self.consecutive_overruns = self.max_consecutive_overruns = 0
        self.lateness_ns = 0
        self.histogram.clear()
        self.t0_ns = self.due_ns = self.wake_ns = time.monotonic_ns()
        self._started = True
        return 0

    def wait(self) -> int:
        if not self._started:
            self.start()
        mono = time.monotonic_ns
        due = self.due_ns + self.period_ns
        self.due_ns = due
        remaining = due - mono()
        if remaining > self.spin_margin_ns:
            time.sleep((remaining - self.spin_margin_ns) * 1e-9)
        now = mono()
        while now < due:
            now = mono()
        self.wake_ns = now
        lateness = now - due
        self.lateness_ns = lateness
        self.ticks += 1
        self.histogram.add(lateness)
        if lateness > self._late_limit:
            self.late += 1
            if lateness > self.period_ns:
                self._overrun(now, lateness)
            else:
                self.consecutive_overruns = 0
        else:
            self.consecutive_overruns = 0
        if self._plant_step is not None:
            self._plant_step(self.period_s)
        return due - self.t0_ns

    def _overrun(self, now_ns: int, lateness_ns: int) -> None:
        self.overruns += 1
        self.consecutive_overruns += 1
        if self.consecutive_overruns > self.max_consecutive_overruns:
            self.max_consecutive_overruns = self.consecutive_overruns
        p = self.policy
        if (p.warn_after is not None and self.overruns >= p.warn_after
                and now_ns - self._last_warning_ns >= 1_000_000_000):
            log.warning("control loop overrun: tick %d started %.0f us late (period %.0f us); "
                        "%d overruns so far, %d since the last warning", self.ticks,
                        lateness_ns * 1e-3, self.period_ns * 1e-3, self.overruns,
                        self.overruns - self._warned_overruns)
            self._last_warning_ns = now_ns
            self._warned_overruns = self.overruns
        k = p.trip_after_consecutive
        if k is not None and self.consecutive_overruns >= k:
            raise SafetyTrip("loop_overrun",
                             f"{self.consecutive_overruns} consecutive ticks more than one period "
                             f"({self.period_ns * 1e-3:.0f} us) late; "
                             f"last {lateness_ns * 1e-3:.0f} us "
                             f"late at tick {self.ticks}")

    def stats(self) -> dict[str, float | int]:
        """Counts and lateness quantiles (us) since ``start()``."""
        h = self.histogram
        n = self.ticks
        return {
            "ticks": n, "period_us": self.period_ns * 1e-3,
            "late": self.late, "late_pct": 100.0 * self.late / n if n else 0.0,
            "overruns": self.overruns, "max_consecutive_overruns": self.max_consecutive_overruns,
            "lateness_p50_us": h.quantile_ns(0.5) * 1e-3,
            "lateness_p99_us": h.quantile_ns(0.99) * 1e-3,
            "lateness_p999_us": h.quantile_ns(0.999) * 1e-3,
            "lateness_max_us": h.max_ns * 1e-3,
            "spin_margin_us": self.spin_margin_ns * 1e-3,
        }

    def close(self) -> None:
        if self._applied:
            self.restore_messages.extend(restore_realtime(self._state))
            self._applied = False

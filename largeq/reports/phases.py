"""Wall time of a whole command and of each of its phases (recorded in summary.json as ``phases``)."""

from __future__ import annotations

import time
from contextlib import contextmanager

__all__ = ["PhaseClock", "process_start_time", "stderr_announcer"]


def stderr_announcer(prefix: str):
    """A PhaseClock ``announce`` that writes ``prefix: line`` to stderr at once (unbuffered in logs too)."""
    import sys

    def announce(line: str) -> None:
        print(f"{prefix}: {line}", file=sys.stderr, flush=True)

    return announce


def process_start_time() -> float:
    """When this process started (seconds since the epoch): the start of a command's wall time.

    On Linux the process's age is read from ``/proc`` against the boot clock (both counted from boot, to
    1/100 s), and subtracted from now. ``psutil.Process().create_time()`` adds the boot time, which the kernel
    reports in whole seconds, so it can place the start up to a second late or early.
    """
    age = _process_age_from_proc()
    if age is not None:
        return time.time() - age
    import psutil

    return float(psutil.Process().create_time())


def _process_age_from_proc() -> float | None:
    """Seconds since this process started, from /proc/uptime and /proc/self/stat; None where unavailable."""
    import os

    try:
        with open("/proc/self/stat") as f:
            stat = f.read()
        with open("/proc/uptime") as f:
            uptime = float(f.read().split()[0])
        # the command name (field 2) may hold spaces; the fields after its closing parenthesis start at field 3
        fields = stat[stat.rindex(")") + 2:].split()
        start_ticks = int(fields[19])  # field 22 of proc(5): starttime, in clock ticks since boot
        ticks = os.sysconf("SC_CLK_TCK")
    except (OSError, ValueError, IndexError):
        return None
    age = uptime - start_ticks / ticks
    return age if age >= 0.0 else None


class PhaseClock:
    """Seconds per named phase and in total since ``started`` (epoch seconds; default: now).

    ``before`` adds time spent in earlier processes (a resumed run's elapsed time before the interruption).
    ``announce`` (optional) receives a line when a phase starts and when it ends, so a long run says what it
    is doing before its progress bar appears.
    """

    def __init__(self, started: float | None = None, before: float = 0.0, announce=None):
        now = time.time()
        self.announce = announce
        self.started = now if started is None else float(started)
        self.before = float(before)
        self.phases: dict[str, float] = {}
        if now - self.started > 1e-3:
            self.phases["startup"] = now - self.started  # interpreter start, imports, argument parsing

    @contextmanager
    def phase(self, name: str):
        t0 = time.time()
        if self.announce is not None:
            self.announce(f"{name} ...")
        try:
            yield
        finally:
            dt = time.time() - t0
            self.phases[name] = self.phases.get(name, 0.0) + dt
            if self.announce is not None:
                self.announce(f"{name}: {dt:.1f} s")

    def add(self, name: str, seconds: float) -> None:
        self.phases[name] = self.phases.get(name, 0.0) + float(seconds)

    def total(self) -> float:
        """Wall seconds of the whole command (plus ``before``)."""
        return self.before + time.time() - self.started

    def as_dict(self) -> dict:
        out = {k: round(v, 6) for k, v in self.phases.items()}
        if self.before:
            out["before_resume"] = round(self.before, 6)
        return out

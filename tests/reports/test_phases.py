"""The command's wall clock starts when its process started, not a second off."""

import subprocess
import sys
import time

from largeq.reports.phases import PhaseClock, process_start_time


def test_start_time_of_a_child_lies_between_launch_and_exit():
    # the child prints when it thinks it started; the parent brackets the launch with its own clock
    t0 = time.time()
    out = subprocess.run([sys.executable, "-c",
                          "from largeq.reports.phases import process_start_time; print(repr(process_start_time()))"],
                         capture_output=True, text=True, check=True).stdout
    t1 = time.time()
    started = float(out)
    # /proc counts in clock ticks (1/100 s on Linux): allow one tick before the launch
    assert t0 - 0.011 <= started <= t1


def test_startup_phase_counts_from_the_given_start():
    clock = PhaseClock(started=time.time() - 0.5)
    assert 0.5 <= clock.phases["startup"] < 5.0
    assert process_start_time() <= time.time()


def test_phases_are_announced_when_asked():
    lines = []
    clock = PhaseClock(announce=lines.append)
    with clock.phase("sector matrices"):
        pass
    assert lines[0] == "sector matrices ..." and lines[1].startswith("sector matrices: ") and lines[1].endswith(" s")
    quiet = PhaseClock()
    with quiet.phase("evolution"):
        pass
    assert "evolution" in quiet.phases

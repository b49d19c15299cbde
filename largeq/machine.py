"""What this computer offers now: memory free for a new allocation, and how long a random read from a vector
of a given size takes (one place; every layer may import it)."""

from __future__ import annotations

import functools
import time

__all__ = ["available_bytes", "last_level_cache_bytes", "peak_rss_bytes", "random_read_seconds"]


def available_bytes() -> int:
    """Memory available to a new allocation now, in bytes (psutil's 'available': free plus reclaimable)."""
    import psutil

    return int(psutil.virtual_memory().available)


def peak_rss_bytes() -> int | None:
    """The largest resident memory of this process so far, in bytes; None where the platform does not say.

    On Linux this is VmHWM of /proc/self/status: the high-water mark of this program's own memory.  The
    usual ``getrusage(RUSAGE_SELF).ru_maxrss`` is kept across exec, so a program started by a large parent
    (a test runner holding gigabytes) would report the parent's peak instead of its own.
    """
    import sys

    try:
        with open("/proc/self/status") as f:
            for line in f:
                if line.startswith("VmHWM:"):
                    return int(line.split()[1]) * 1024
    except OSError:
        pass
    try:
        import resource
    except ImportError:  # Windows
        return None
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    return int(peak if sys.platform == "darwin" else peak * 1024)  # bytes on macOS, KiB elsewhere


def last_level_cache_bytes() -> int | None:
    """Size of the largest data cache of CPU 0 (Linux sysfs), in bytes; None where it cannot be read."""
    import glob

    sizes = []
    for d in glob.glob("/sys/devices/system/cpu/cpu0/cache/index*"):
        try:
            with open(f"{d}/type") as f:
                if f.read().strip() == "Instruction":
                    continue
            with open(f"{d}/size") as f:
                text = f.read().strip().upper()
        except OSError:
            continue
        scale = {"K": 1 << 10, "M": 1 << 20, "G": 1 << 30}.get(text[-1:], 1)
        digits = text[:-1] if text[-1:] in "KMG" else text
        if digits.isdigit():
            sizes.append(int(digits) * scale)
    return max(sizes) if sizes else None


def random_read_seconds(nbytes: int, *, reads: int = 4_000_000, repeats: int = 5) -> float:
    """Seconds per random read of one complex128 entry from a vector of ``nbytes`` bytes, all cores reading
    (the fastest of ``repeats`` timings).

    Products with a sparse matrix read the input vector at scattered positions; once the vector no longer
    fits in the caches each read waits for memory, several times longer than a cached one.  The ratio of this
    time at two vector sizes scales a product's time measured at one size to the other.
    """
    import numpy as np

    gather_sum = _gather_kernel()
    n = max(int(nbytes) // 16, 1)
    x = np.ones(n, np.complex128)
    idx = np.random.default_rng(0).integers(0, n, int(reads)).astype(np.int64)
    out = np.zeros(64, np.complex128)
    gather_sum(x, idx, out)  # compile, and touch the pages
    times = []
    for _ in range(int(repeats)):
        t0 = time.perf_counter()
        gather_sum(x, idx, out)
        times.append(time.perf_counter() - t0)
    return float(np.min(times)) / idx.size  # the fastest: other jobs on the machine only add time


@functools.cache
def _gather_kernel():
    """sum of x[idx] in fixed chunks over all threads (compiled on first use)."""
    from numba import njit, prange

    @njit(parallel=True)
    def gather_sum(x, idx, out):
        nc = out.shape[0]
        n = idx.shape[0]
        for c in prange(nc):
            s = 0j
            for i in range(c * n // nc, (c + 1) * n // nc):
                s += x[idx[i]]
            out[c] = s

    return gather_sum

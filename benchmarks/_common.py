"""Helpers shared by the benchmark scripts (not part of the package)."""

from __future__ import annotations

import json
import os
import statistics
import sys
import time

import numpy as np

from largeq.model.pauli import PauliSum, pauli_string


def j1j2_ring(L: int, j1: float = 1.0, j2: float = 0.3, d1: float = 1.0, d2: float = 1.0) -> PauliSum:
    """The J1-J2 XXZ ring in S = sigma/2 units (j2 = 0.3: away from the Majumdar-Ghosh point)."""
    xs, zs, cs = [], [], []
    for r, J, D in ((1, j1, d1), (2, j2, d2)):
        for i in range(L):
            j = (i + r) % L
            for letter, c in (("X", J / 4), ("Y", J / 4), ("Z", J * D / 4)):
                p = pauli_string(L, {i: letter, j: letter}, c)
                xs.append(p.x_mask[0]); zs.append(p.z_mask[0]); cs.append(c)
    return PauliSum(L, np.array(xs), np.array(zs), np.array(cs)).simplify()


def median_time(fn, repeats: int = 7, warmup: int = 1) -> float:
    for _ in range(warmup):
        fn()
    ts = []
    for _ in range(repeats):
        t = time.perf_counter()
        fn()
        ts.append(time.perf_counter() - t)
    return statistics.median(ts)


def copy_bandwidth(n_bytes: int = 512 * 2**20) -> float:
    """Bytes per second of a numpy copy (bytes read + bytes written), median of 5."""
    src = np.ones(n_bytes // 8)
    dst = np.empty_like(src)
    t = median_time(lambda: np.copyto(dst, src), repeats=5)
    return 2 * src.nbytes / t


def peak_rss_bytes() -> int:
    """Peak resident memory of this process so far (its own, not a parent's: see largeq.machine)."""
    from largeq.machine import peak_rss_bytes as own_peak

    return int(own_peak())


def print_table(headers, rows) -> None:
    widths = [max(len(str(h)), *(len(str(r[i])) for r in rows)) for i, h in enumerate(headers)]
    print("  ".join(str(h).rjust(w) for h, w in zip(headers, widths)))
    for r in rows:
        print("  ".join(str(c).rjust(w) for c, w in zip(r, widths)))
    sys.stdout.flush()


def emit_json(obj) -> None:
    print(json.dumps(obj, sort_keys=True))


def machine_line() -> str:
    import numba

    return (f"# machine: {os.cpu_count()} cores, numba {numba.__version__} with {numba.get_num_threads()} threads, "
            f"numpy {np.__version__}")

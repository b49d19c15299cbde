"""Memory forecasts for a run, made before anything large is allocated.

The numbers count full-size state vectors (the dominant cost) plus the operator tables.
A run whose forecast exceeds the memory available is refused with the estimate and the
cheaper alternatives.
"""

from __future__ import annotations

from dataclasses import dataclass
from math import comb

import numpy as np
import psutil

__all__ = ["MemoryForecast", "evolution_forecast", "kpm_forecast", "exact_forecast", "available_bytes",
           "check_fits", "MemoryRefusal", "format_bytes"]

COMPLEX = np.dtype(np.complex128).itemsize
OVERHEAD_BYTES = 400 * 2**20  # interpreter, numba, scipy, h5py: measured ~300-400 MB resident


def format_bytes(n: float) -> str:
    for unit, size in (("GiB", 2**30), ("MiB", 2**20), ("KiB", 2**10)):
        if abs(n) >= size:
            return f"{n / size:.2f} {unit}"
    return f"{int(n)} B"


def available_bytes() -> int:
    """Memory available to a new allocation now (psutil's 'available')."""
    return int(psutil.virtual_memory().available)


@dataclass(frozen=True)
class MemoryForecast:
    """Predicted peak memory of one method.

    Attributes
    ----------
    method : str
    dimension : int
    vectors : float
        Number of full-size complex vectors held at the peak.
    vector_bytes : int
    table_bytes : int
    total_bytes : int
    note : str
    """

    method: str
    dimension: int
    vectors: float
    vector_bytes: int
    table_bytes: int
    total_bytes: int
    note: str

    def as_dict(self) -> dict:
        return {
            "method": self.method,
            "dimension": self.dimension,
            "vectors": self.vectors,
            "vector_bytes": self.vector_bytes,
            "table_bytes": self.table_bytes,
            "total_bytes": self.total_bytes,
            "total_human": format_bytes(self.total_bytes),
            "note": self.note,
        }


def table_bytes_estimate(n_sites: int, n_terms: int = 64) -> int:
    """Operator and basis tables: O(2^(L/2)) entries per table (see largeq.operators)."""
    half = 1 << ((n_sites + 1) // 2)
    return int(half * (8 * 6 + 3 * n_terms))


def evolution_forecast(dimension: int, n_sites: int, *, method: str = "chebyshev", block: int = 1,
                       krylov_dim: int = 30) -> MemoryForecast:
    """Peak memory of a time evolution.

    Chebyshev: the state, the initial state (survival amplitude), two recursion vectors and
    one accumulator per output time of a block: 4 + block vectors.  Lanczos: the state, the
    initial state and krylov_dim + 1 Krylov vectors.  Checkpoints write the state without a copy.
    """
    if method == "chebyshev":
        vectors = 4 + block
        note = f"Chebyshev: state, initial state, 2 recursion vectors, {block} accumulator(s)"
    elif method == "lanczos":
        vectors = 3 + krylov_dim
        note = f"Lanczos: state, initial state, {krylov_dim + 1} Krylov vectors"
    else:
        raise ValueError(f"method: got {method!r}; allowed: 'chebyshev', 'lanczos'")
    vb = dimension * COMPLEX
    tb = table_bytes_estimate(n_sites)
    return MemoryForecast(method, dimension, vectors, vb, tb, int(vectors * vb + tb + OVERHEAD_BYTES), note)


def kpm_forecast(dimension: int, n_sites: int) -> MemoryForecast:
    """KPM moments: the start vector and two recursion vectors."""
    vb = dimension * COMPLEX
    tb = table_bytes_estimate(n_sites)
    return MemoryForecast("kpm", dimension, 3, vb, tb, int(3 * vb + tb + OVERHEAD_BYTES),
                          "KPM: start vector and two Chebyshev recursion vectors")


def exact_forecast(dimension: int) -> MemoryForecast:
    """Dense diagonalization: the matrix, its eigenvectors and LAPACK workspace (~3 D^2 complex)."""
    b = 3 * dimension * dimension * COMPLEX
    return MemoryForecast("exact", dimension, float("nan"), dimension * COMPLEX, 0, int(b + OVERHEAD_BYTES),
                          "dense diagonalization: matrix, eigenvectors, workspace")


class MemoryRefusal(RuntimeError):
    """A run was refused before allocating because its forecast exceeds the available memory."""


def check_fits(forecast: MemoryForecast, *, n_sites: int, up_spins: int | None, available: int | None = None,
               fraction: float = 0.9) -> None:
    """Raise MemoryRefusal (with the estimate and cheaper options) when the forecast does not fit."""
    avail = available_bytes() if available is None else int(available)
    if forecast.total_bytes <= fraction * avail:
        return
    options = []
    for L in range(n_sites - 2, 1, -2):  # same parity: Neel and staggered patterns need even L
        dim = comb(L, L // 2) if up_spins is not None else 2**L
        f = evolution_forecast(dim, L, method="chebyshev") if forecast.method != "exact" else exact_forecast(dim)
        if f.total_bytes <= fraction * avail:
            options.append(f"a smaller chain: L = {L} needs {format_bytes(f.total_bytes)}")
            break
    if up_spins is None:
        dim = comb(n_sites, n_sites // 2)
        f = evolution_forecast(dim, n_sites)
        options.append(f"a magnetization sector (an initial z-basis state and an H without x fields or XYZ "
                       f"anisotropy): L = {n_sites} at n_up = {n_sites // 2} needs {format_bytes(f.total_bytes)}")
    if forecast.method == "lanczos":
        options.append("method = 'chebyshev' holds 5 vectors instead of the Krylov basis")
    if forecast.method == "chebyshev" and forecast.vectors > 5:
        options.append("a smaller output block (fewer accumulator vectors)")
    if not options:
        options.append("none on this machine: use one with more memory (see 'largeq describe' for the forecast)")
    raise MemoryRefusal(
        f"refusing to start: the {forecast.method} run needs about {format_bytes(forecast.total_bytes)} "
        f"({forecast.vectors:g} vectors of {format_bytes(forecast.vector_bytes)} for dimension {forecast.dimension:,}) "
        f"but only {format_bytes(avail)} is available. Cheaper options: " + "; ".join(options)
    )


# ---------------------------------------------------------------------------- measured peak memory
class PeakRSS:
    """Context manager that samples this process's resident memory (psutil) in a background thread.

    ``peak`` is the largest RSS seen (bytes), ``start`` the RSS on entry; sampling every ``interval``
    seconds misses spikes shorter than that (vectors live for whole steps, so peaks are held long enough).
    """

    def __init__(self, interval: float = 0.02):
        self.interval = float(interval)
        self.start = 0
        self.peak = 0
        self._stop = None
        self._thread = None

    def _sample(self) -> None:
        proc = psutil.Process()
        while not self._stop.is_set():
            self.peak = max(self.peak, proc.memory_info().rss)
            self._stop.wait(self.interval)

    def __enter__(self) -> "PeakRSS":
        import threading

        self.start = self.peak = psutil.Process().memory_info().rss
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._sample, daemon=True)
        self._thread.start()
        return self

    def __exit__(self, *exc) -> None:
        self._stop.set()
        self._thread.join()
        self.peak = max(self.peak, psutil.Process().memory_info().rss)


__all__ += ["PeakRSS"]

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

from largeq.machine import available_bytes

__all__ = ["MemoryForecast", "evolution_forecast", "kpm_forecast", "exact_forecast", "available_bytes",
           "check_fits", "MemoryRefusal", "format_bytes"]

COMPLEX = np.dtype(np.complex128).itemsize
OVERHEAD_BYTES = 400 * 2**20  # interpreter, numba, scipy, h5py: measured ~300-400 MB resident


def format_bytes(n: float) -> str:
    """Bytes in the largest binary unit that keeps the number >= 1 (B .. EiB; beyond that, EiB in e-notation)."""
    units = (("EiB", 2**60), ("PiB", 2**50), ("TiB", 2**40), ("GiB", 2**30), ("MiB", 2**20), ("KiB", 2**10))
    if abs(n) >= 1024 * 2**60:
        return f"{n / 2**60:.3g} EiB"
    for unit, size in units:
        if abs(n) >= size:
            return f"{n / size:.2f} {unit}"
    return f"{int(n)} B"


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


# ---------------------------------------------------------------------------- the run plan (no enumeration)
def choose_block(dimension: int, n_sites: int, n_times: int, available: int, method: str) -> int:
    """Output times per Chebyshev expansion: up to 8, while the run uses at most half the memory.

    Sharing an expansion saves the O(log 1/tol) start-up of each step but holds one
    accumulator vector per output time (common practice: a handful of outputs per block).
    """
    if method != "chebyshev":
        return 1
    block = 1
    for k in (8, 4, 2):
        if k < n_times and evolution_forecast(dimension, n_sites, block=k).total_bytes <= 0.5 * available:
            block = k
            break
    return block


@dataclass(frozen=True)
class SectorCount:
    """One symmetry sector the initial state touches: quantum numbers, dimension (counted) and weight."""

    momentum: int
    reflection: int | None
    flip: int | None
    dimension: int
    weight: float
    real: bool
    label: str
    up_spins: int | None = None

    @property
    def key(self) -> tuple:
        return (self.momentum, self.reflection, self.flip)

    @property
    def full_key(self) -> tuple:
        """(n_up or None for a full-space sector, momentum, reflection parity, flip parity)."""
        return (self.up_spins, *self.key)


@dataclass(frozen=True)
class RunPlan:
    """The path ``relax`` takes for a scenario and what it costs, decided by counting (nothing enumerated).

    Attributes
    ----------
    path : str
        "sectors" (momentum / reflection / spin-flip sectors), "magnetization" (one magnetization sector)
        or "full" (the full space).
    reason : str
        Why this path, in words.
    sectors_refused : str
        Why the sector path was not taken ("" when it was).
    n_sites, up_spins, basis_dimension, basis_label, basis_reason
        The magnetization / full basis (what ``build_problem`` would build).
    dimension : int
        States evolved (sum over sectors on the sector path).
    sectors : tuple of SectorCount
    sector_note : str
    block : int
    store : bool
        Sector matrices stored (CSR) rather than applied matrix-free.
    store_observables : bool
        Observable blocks across sectors stored (CSR) rather than applied matrix-free.
    sector_group : dict or None
        On the sector path: the group used ({translation, reflection, spin_flip}) and
        ``conserve_magnetization`` (sectors resolved in n_up, or full-space sectors).
    parts : dict
        Bytes of the parts of the forecast (vectors, stored matrices, their assembly, tables, interpreter).
    forecast : MemoryForecast
    available : int
    """

    path: str
    reason: str
    sectors_refused: str
    n_sites: int
    up_spins: int | None
    basis_dimension: int
    basis_label: str
    basis_reason: str
    dimension: int
    sectors: tuple
    sector_note: str
    block: int
    store: bool
    parts: dict
    forecast: MemoryForecast
    available: int
    products: int = 0
    seconds_estimate: float = 0.0
    store_observables: bool = False
    sector_group: dict | None = None

    @property
    def fits(self) -> bool:
        return self.forecast.total_bytes <= 0.9 * self.available

    def as_dict(self) -> dict:
        return {"path": self.path, "reason": self.reason, "sectors_refused": self.sectors_refused,
                "sites": self.n_sites, "up_spins": self.up_spins, "basis_dimension": self.basis_dimension,
                "basis": self.basis_label, "dimension": self.dimension,
                "sectors": [{"label": c.label, "up_spins": c.up_spins, "momentum": c.momentum, "reflection": c.reflection, "flip": c.flip,
                             "dimension": c.dimension, "weight": c.weight, "real": c.real} for c in self.sectors],
                "sector_note": self.sector_note, "block": self.block, "stored_matrices": self.store,
                "stored_observables": self.store_observables,
                "parts": dict(self.parts), "forecast": self.forecast.as_dict(), "available_bytes": self.available,
                "fits": self.fits, "products": self.products, "seconds_estimate": self.seconds_estimate}


def _stabiliser(bits: int, L: int, reflection: bool, spin_flip: bool) -> list[tuple[int, int, int]]:
    """Group elements (reflect?, flip?, shift j) that leave the z-basis state ``bits`` unchanged."""
    full = (1 << L) - 1
    out = []
    for p in range(2 if reflection else 1):
        s1 = int(format(bits, f"0{L}b")[::-1], 2) if p else bits
        for ff in range(2 if spin_flip else 1):
            s2 = s1 ^ full if ff else s1
            for j in range(L):
                s = ((s2 << j) | (s2 >> (L - j))) & full if j else s2
                if s == bits:
                    out.append((p, ff, j))
    return out


def count_state_sectors(bits: int, n_sites: int, *, reflection: bool, spin_flip: bool) -> tuple[list[SectorCount], str]:
    """The sectors a z-basis state touches, their dimensions (Burnside counts) and weights, without enumeration.

    |b> has weight |Stab(b)| / |G| in every sector whose one-dimensional character is trivial on the
    stabiliser of b, and none elsewhere (P_chi = (1/|G|) sum_g conj(chi(g)) g, <b|P_chi|b>).  The same
    sectors, order and notes as :func:`largeq.operators.sector_operator.split_basis_state`.
    """
    from largeq.basis.counting import sector_dimension

    L = int(n_sites)
    n_up = int(bits).bit_count()

    def split(refl: bool):
        stab = _stabiliser(bits, L, refl, spin_flip)
        order = L * (2 if refl else 1) * (2 if spin_flip else 1)
        w = len(stab) / order
        comps, total = [], 0.0
        for m in range(L):
            if refl and (2 * m) % L:
                continue
            for r in ((1, -1) if refl else (None,)):
                for f in ((1, -1) if spin_flip else (None,)):
                    ok = all(abs(np.exp(2j * np.pi * m * j / L) * (r if p else 1) * (f if ff else 1) - 1) < 1e-9
                             for p, ff, j in stab)
                    if not ok:
                        continue
                    dim = sector_dimension(L, n_up, momentum=m, reflection=r, flip=f)
                    real = (2 * m) % L == 0
                    parts = [f"n_up = {n_up} of L = {L}", f"k = 2 pi * {m}/{L}"]
                    if r is not None:
                        parts.append(f"reflection {r:+d}")
                    if f is not None:
                        parts.append(f"spin flip {f:+d}")
                    label = ", ".join(parts) + f" (dimension {dim:,}, {'real' if real else 'complex'})"
                    comps.append(SectorCount(m, r, f, dim, w, real, label))
                    total += w
        return comps, total

    comps, total = split(reflection)
    note = (f"group: T {'R ' if reflection else ''}{'F' if spin_flip else ''}".strip()
            + f"; |b> = {bits:#x} touches {len(comps)} sector(s), weights sum to {total:.15f}")
    if reflection and abs(total - 1.0) > 1e-10:
        comps, total = split(False)
        note = (f"reflection dropped: the state has weight outside k = 0, pi (two-dimensional representations of "
                f"the dihedral group); group T{' F' if spin_flip else ''}; {len(comps)} sector(s), weights sum to "
                f"{total:.15f}")
    return comps, note


def sector_memory(dims: list[int], *, real: bool, n_groups: int, block: int, available: int, n_sites: int = 0,
                  off_diagonal: tuple = (), invariant: tuple = ()) -> tuple[bool, dict]:
    """Memory of the sector path: (store the sector matrices?, parts in bytes with 'total').

    Stored sector matrix: about one entry per state for every other off-diagonal group (flip-flop terms
    vanish on parallel spins) plus the diagonal; 6 bytes per real entry (int32 column, uint16 code into
    the table of distinct values), 20 per complex one (int32 column, complex128 value).  A sector's
    matrix is assembled in place in two passes over its rows (count, then fill): the extra memory is one
    8-byte count per row, freed before the entries are allocated.  Sectors are assembled one after the
    other, before the evolution allocates its vectors.

    Observables across sectors (``off_diagonal``: one flag per observable, True when it is off-diagonal in
    the z basis) are stored as CSR blocks, one per sector pair with the rows of the first sector, when the
    sector matrices are stored and the blocks fit as well: about L/2 + 1 entries per row for an off-diagonal
    local term summed over its translates, one for a diagonal one.  An observable invariant under the
    group (``invariant``, one flag per observable: e.g. a single bond averaged over the start's
    stabiliser) has only the diagonal blocks, one per sector, coded like the sector matrices; any other
    has a block for every pair of sectors.  ``parts['stored_observables']`` holds their bytes
    (0: evaluated matrix-free).
    """
    vec = 16 * sum(dims)
    entry = 6 if real else 20
    stored = sum(d * (n_groups / 2 + 1) * entry + 8 * d for d in dims)
    largest = max(dims)
    build = 8 * largest
    vectors = (4 + 2 * block) * vec
    stored_peak = stored + max(build, vectors)
    store = stored_peak <= 0.8 * available
    pairs = (len(dims) + 1) / 2 * sum(dims)
    invariant = tuple(invariant) + (False,) * (len(off_diagonal) - len(invariant))
    # a diagonal invariant observable is kept as one 8-byte number per state whether or not blocks are stored
    always = sum(8 * sum(dims) for off, inv in zip(off_diagonal, invariant) if inv and not off)
    obs = sum(sum(dims) * (entry * (n_sites / 2 + 1) + 8) if inv else pairs * (12 if real else 20) * (
        (n_sites / 2 + 1) if off else 1) for off, inv in zip(off_diagonal, invariant) if off or not inv)
    stored_peak += always
    vectors += always
    store_obs = bool(obs) and store and stored_peak + obs <= 0.8 * available
    if store_obs:
        stored_peak += obs
    total = int((stored_peak if store else vectors) + OVERHEAD_BYTES)
    return store, {"vectors": int(vectors), "stored_matrices": int(stored) if store else 0,
                   "matrix_assembly": int(build) if store else 0,
                   "stored_observables": int(obs) if store_obs else 0, "interpreter": OVERHEAD_BYTES, "total": total}


def sector_decision(*, symmetry: str, method: str, symmetries: dict, start, basis_up_spins: int | None,
                    plain_dimension: int, basis_label: str) -> dict:
    """Whether ``relax`` evolves in momentum (+ reflection, spin-flip) sectors, and in which ones,
    decided without enumerating any sector (``plan_run``, hence describe, forecast and relax, call this).

    The sectors apply when the method is Chebyshev and H is translation invariant; any product
    start (z-basis or tilted) and any Hermitian Pauli-sum observable are handled (observables across
    sectors by ``largeq.operators.sector_operator.sector_observables``).  With a conserved
    magnetization the sectors are resolved in n_up as well; otherwise they are sectors of the full
    2^L space.  The touched sectors and their weights come from
    ``largeq.operators.sector_operator.product_sector_weights`` (O(|G| L^2)), their dimensions from
    character sums over fixed points (``sector_dimensions``); the sectors are used when their total
    dimension is at most half the basis ``relax`` would otherwise use (a state spread over every
    momentum gains nothing and would pay for the cross-sector pairs).

    Returns a dict: ``use`` (bool), ``reason`` (words), and when translation applies ``group``
    (flags), ``conserve_magnetization``, ``sectors`` [{key: (n_up or None, m, r, f), weight,
    dimension}], ``total_dimension``, ``plain_dimension``, ``note``.
    """
    from largeq.operators.sector_operator import choose_sectors

    sym = symmetries
    if symmetry == "off":
        return {"use": False, "reason": "symmetry sectors switched off (symmetry = off)"}
    if method != "chebyshev":
        return {"use": False, "reason": f"symmetry sectors need the Chebyshev method (the scenario asks for {method})"}
    if not sym["translation"]:
        return {"use": False, "reason": "H is not translation invariant (open chain, or site-dependent couplings/fields)"}
    if basis_up_spins is not None and start.up_spins is None:
        return {"use": False, "reason": (f"the run evolves the projection of the initial state on n_up = "
                                         f"{basis_up_spins} (sector.up_spins), not the state itself")}
    conserve = bool(sym["conserves_magnetization"])
    choice = choose_sectors(start.spinors, conserve_magnetization=conserve, reflection=sym["reflection"],
                            spin_flip=sym["spin_flip"])
    total = int(sum(s["dimension"] for s in choice["sectors"]))
    plain = int(plain_dimension)
    choice.update(total_dimension=total, plain_dimension=plain, conserve_magnetization=conserve)
    if total > plain // 2:
        choice.update(use=False, reason=(f"the initial state spreads over {len(choice['sectors'])} symmetry sectors "
                                         f"of total dimension {total:,}, not less than half of {plain:,}: "
                                         f"evolving in {basis_label} instead"))
        return choice
    dims = [s["dimension"] for s in choice["sectors"]]
    shown = " + ".join(f"{d:,}" for d in dims[:12]) + (f" + ... ({len(dims)} sectors)" if len(dims) > 12 else "")
    choice.update(use=True, reason=(f"H is translation invariant: the initial state splits into {len(dims)} symmetry "
                                    f"sector(s) of dimensions {shown} = {total:,} (instead of {plain:,}); "
                                    f"{choice['note']}"))
    return choice


def _evaluated_observables(observables: dict, start, choice: dict, L: int, up: int | None) -> list[tuple]:
    """(Pauli sum the sector run evaluates, invariant under the group?) per observable, as ``relax``
    chooses them (``observables_for_start`` for a z-basis start)."""
    from largeq.basis.sectors import GroupSpec
    from largeq.operators.sector_operator import is_invariant, observables_for_start

    g = choice["group"]
    group = GroupSpec(L, up if choice["conserve_magnetization"] else None, translation=True,
                      reflection=bool(g["reflection"]),
                      spin_flip=bool(g["spin_flip"]) and up is not None and 2 * up == L)
    paulis = {n: o.pauli for n, o in observables.items()}
    if start.bits is not None:
        paulis, _ = observables_for_start(paulis, start.bits, group)
    return [(a, all(is_invariant(a, group).values())) for a in paulis.values()]


def _sector_count(L: int, sec: dict) -> SectorCount:
    n, m, r, f = sec["key"]
    real = m is None or (2 * m) % L == 0
    parts = [f"n_up = {n} of L = {L}" if n is not None else f"all magnetizations of L = {L}"]
    if m is not None:
        parts.append(f"k = 2pi*{m}/{L}")
    if r is not None:
        parts.append(f"reflection {r:+d}")
    if f is not None:
        parts.append(f"spin flip {f:+d}")
    label = ", ".join(parts) + f" (dimension {sec['dimension']:,}, {'real' if real else 'complex'})"
    return SectorCount(m, r, f, int(sec["dimension"]), float(sec["weight"]), real, label, n)


def check_time_resolution(scenario, H) -> None:
    """Refuse output steps too short to resolve: ||H|| dt below ``MIN_PHASE_STEP`` (||H|| <= sum |c|)."""
    from largeq.constants import MIN_PHASE_STEP
    from largeq.scenario.spec import MAX_TIME
    from largeq.workflows.errors import OptionError

    times = scenario.time.times()
    if times.size < 2:
        return
    norm = float(np.sum(np.abs(H.coeff)))
    if norm == 0.0:
        return
    dt = float(np.min(np.diff(times)))
    if norm * dt < MIN_PHASE_STEP:
        lo = MIN_PHASE_STEP / norm * (scenario.time.t_max / dt)
        raise OptionError(
            f"time.t_max = {scenario.time.t_max:g} is below the resolution of the propagation: an output step "
            f"dt = {dt:.3g} turns the phase by ||H|| dt <= {norm * dt:.3g} < {MIN_PHASE_STEP:g} (||H|| <= {norm:.4g}); "
            f"allowed with this grid: t_max in [{lo:.3g}, {MAX_TIME:g}]")


#: rough cost of one product per (state x Pauli string) on one machine: 5-8 ns measured with
#: ``largeq.workflows.forecast.calibrate`` on the 2-core development machine (L = 14-18, three built-in
#: examples); ``largeq forecast`` measures the machine it runs on instead
ROUGH_SECONDS_PER_STATE_TERM = 8e-9
#: Lanczos steps of the spectral bounds (engines.bounds default)
BOUNDS_PRODUCTS = 60


def _time_estimate(scenario, H, dimension: int, block: int) -> tuple[int, float]:
    """Products of the evolution (Chebyshev orders per block at the half-width bound sum |c|, an
    overestimate by up to ~2.5x for the built-in examples) and an uncalibrated time at
    ``ROUGH_SECONDS_PER_STATE_TERM``."""
    from largeq.engines.propagate import chebyshev_order

    times = scenario.time.times()
    a = float(np.sum(np.abs(H.coeff)))
    tol = scenario.numerics.tolerance
    products = BOUNDS_PRODUCTS
    n = times.size
    i = 0
    cache: dict[float, int] = {}
    while i < n - 1:
        j = min(n - 1, i + block)
        span = round(float(times[j] - times[i]), 12)
        if span not in cache:
            cache[span] = chebyshev_order(a * span, tol)[0] - 1
        products += cache[span]
        i = j
    return int(products), float(products) * dimension * max(len(H.coeff), 1) * ROUGH_SECONDS_PER_STATE_TERM


def plan_run(scenario, *, symmetry: str = "auto", block: int | None = None, available: int | None = None,
             model_parts: dict | None = None, check_times: bool = True) -> RunPlan:
    """The path ``relax`` takes for ``scenario`` and its memory, from counting alone (no basis tables, no
    enumeration of sectors, no state vector).  ``relax``, ``describe`` and ``forecast`` all call this.

    ``model_parts`` may pass {"hamiltonian", "symmetries", "start", "observables"} already built;
    ``check_times`` refuses output steps too short to resolve (:func:`check_time_resolution`).
    """
    from largeq.basis.spaces import basis_decision, basis_label, basis_table_bytes
    from largeq.model import build as model

    if symmetry not in ("auto", "off"):
        from largeq.workflows.errors import OptionError

        raise OptionError(f"symmetry: got {symmetry!r}; allowed: 'auto', 'off'")
    if block is not None and (isinstance(block, bool) or not isinstance(block, (int, np.integer)) or block < 1):
        from largeq.workflows.errors import OptionError

        raise OptionError(f"block: got {block!r}; allowed: an integer >= 1 (output times per Chebyshev expansion)")
    avail = available_bytes() if available is None else int(available)
    parts = model_parts or {}
    H = parts["hamiltonian"] if "hamiltonian" in parts else model.hamiltonian(scenario)
    sym = parts["symmetries"] if "symmetries" in parts else model.symmetries(scenario, H)
    start = parts["start"] if "start" in parts else model.initial_state(scenario)
    observables = parts["observables"] if "observables" in parts else model.observables(scenario, H)
    L = scenario.n_sites
    method = scenario.numerics.method
    n_times = scenario.time.n_points
    if check_times:
        check_time_resolution(scenario, H)
    requested = scenario.sector.up_spins
    requested = None if requested == "auto" else int(requested)
    try:
        up, basis_reason = basis_decision(L, conserves_magnetization=sym["conserves_magnetization"],
                                          state_up_spins=start.up_spins, requested_up_spins=requested)
    except ValueError as exc:
        from largeq.workflows.errors import WorkflowError

        raise WorkflowError(str(exc)) from None
    D = (1 << L) if up is None else comb(L, up)
    label = basis_label(L, up)
    tables = basis_table_bytes(L, up)

    choice = sector_decision(symmetry=symmetry, method=method, symmetries=sym, start=start, basis_up_spins=up,
                             plain_dimension=D, basis_label=label)
    refused = "" if choice["use"] else choice["reason"]
    if not refused:
        comps = [_sector_count(L, sec) for sec in choice["sectors"]]
        note = choice["note"]
        dims = [c.dimension for c in comps]
        evaluated = _evaluated_observables(observables, start, choice, L, up)
        common = dict(real=all(c.real for c in comps), n_groups=len(H.groups()), available=avail, n_sites=L,
                      off_diagonal=tuple(not a.is_diagonal() for a, _ in evaluated),
                      invariant=tuple(inv for _, inv in evaluated))
        # output times per expansion: the largest of 8, 4, 2, 1 with which the sector matrices and the
        # observable blocks that need storing stay stored (stored products are ~10x faster than orbit scans,
        # and matrix-free observables cost orbit scans at every output); else the largest that keeps the
        # matrices; 8 when none does
        blk = block
        if blk is None:
            fits = [(k, *sector_memory(dims, block=k, **common)) for k in (8, 4, 2, 1)]
            blk = next((k for k, st, m in fits if st and (m["stored_observables"] or not any(
                off or not inv for off, inv in zip(common["off_diagonal"], common["invariant"])))),
                next((k for k, st, _ in fits if st), 8))
        store, mem = sector_memory(dims, block=blk, **common)
        store_obs = bool(mem["stored_observables"])
        mem["tables"] = tables
        total = mem["total"] + tables
        mem["total"] = total
        fc = MemoryForecast("chebyshev (sectors)", int(sum(dims)), (4 + 2 * blk) * len(dims), max(dims) * COMPLEX,
                            int(mem["stored_matrices"]) + int(mem["stored_observables"]) + tables, int(total),
                            f"{len(dims)} sector(s) {dims}; stored sector matrices: {'yes' if store else 'no'}; "
                            f"stored observable blocks: {'yes' if store_obs else 'no'}")
        # every sector runs its own bounds and expansions: the products add up over the sectors, the time
        # is that of one run on the summed dimension
        products, seconds = _time_estimate(scenario, H, int(sum(dims)), blk)
        products *= len(dims)
        group = dict(choice["group"], conserve_magnetization=choice["conserve_magnetization"])
        return RunPlan("sectors", choice["reason"], "", L, up, D, label, basis_reason, int(sum(dims)), tuple(comps),
                       note, blk, store, mem, fc, avail, products, seconds, store_obs, group)
    blk = block or choose_block(D, L, n_times, avail, method)
    fc = evolution_forecast(D, L, method=method, block=blk)
    mem = {"vectors": int(fc.vectors * fc.vector_bytes), "tables": int(fc.table_bytes),
           "interpreter": OVERHEAD_BYTES, "total": int(fc.total_bytes)}
    path = "full" if up is None else "magnetization"
    products, seconds = _time_estimate(scenario, H, D, blk if method == "chebyshev" else 1)
    return RunPlan(path, f"{basis_reason}; {refused}", refused, L, up, D, label, basis_reason, D, (), "", blk, False,
                   mem, fc, avail, products, seconds)


__all__ += ["RunPlan", "SectorCount", "plan_run", "check_time_resolution", "count_state_sectors", "choose_block", "sector_memory",
           "sector_decision"]


def check_basis_fits(scenario, forecast_for, available: int | None = None) -> None:
    """Refuse before any table is built: ``forecast_for(dimension, n_sites)`` is the command's memory
    forecast for the basis ``build_problem`` would build (found by counting)."""
    plan = plan_run(scenario, symmetry="off", available=available, check_times=False)
    check_fits(forecast_for(plan.basis_dimension, plan.n_sites), n_sites=plan.n_sites, up_spins=plan.up_spins,
               available=available)


__all__ += ["check_basis_fits"]

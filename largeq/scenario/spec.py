"""Scenario description: what to simulate, as frozen dataclasses, and its TOML loader.

A scenario names the chain (length, boundary), the Hamiltonian (a built-in preset or explicit
translation-invariant couplings, explicit bonds and on-site fields), the initial product state,
the observables, the output time grid, an optional magnetization sector and engine settings.
The full key reference is in ``docs/scenario.md``; conventions in ``docs/conventions.md``.

Validation happens here, once: every problem raises :class:`ScenarioError` whose message names
the field path (e.g. ``chain.sites``), the bad value and what is allowed.  Everything downstream
(model building, engines) may assume a valid :class:`Scenario`.

Units: hbar = 1.  Couplings and fields multiply spin operators S = sigma / 2; observables are
Pauli operators sigma.  Time is in inverse units of the couplings.
"""

from __future__ import annotations

import difflib
import math
import re
import secrets
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from largeq.scenario import presets as _presets
from largeq.scenario.terms import Bond, Coupling, Field

__all__ = [
    "ScenarioError",
    "Chain",
    "ModelPreset",
    "Coupling",
    "Bond",
    "Field",
    "Start",
    "ObservableSpec",
    "TimeGrid",
    "Sector",
    "Numerics",
    "Scenario",
    "parse_scenario",
    "load_scenario",
    "scenario_to_toml",
    "scenario_to_dict",
    "MAX_SITES",
    "MIN_SITES",
]

MIN_SITES = 2
MAX_SITES = 62
MAX_POINTS = 10_000_000
MAX_SEED = 2**63 - 1
MAX_STRENGTH = 1e12  # largest |coupling|, |field| or preset parameter accepted
MAX_TIME = 1e9  # largest t_max accepted

BOUNDARIES = ("periodic", "open")
PRESETS = ("j1j2_ring", "mixed_field_ising", "random_field_heisenberg", "xx_chain")
FIELD_AXES = ("x", "y", "z")
FIELD_PATTERNS = ("uniform", "staggered", "random", "values")
START_STATES = ("neel", "domain_wall", "bits", "tilted")
OBSERVABLE_KINDS = ("site", "sum", "zz", "bond")
OBS_AXES = ("x", "y", "z")
METHODS = ("chebyshev", "lanczos")
_NAME_RE = re.compile(r"[A-Za-z0-9_]+")


# ---------------------------------------------------------------------------- errors
class ScenarioError(ValueError):
    """A scenario is malformed.

    The message always has the form
    ``scenario field '<path>': got <value>; allowed: <what is allowed>`` (plus the source file
    when known), so the command line can print it as a single line.

    Attributes
    ----------
    path : str
        Dotted field path, e.g. ``chain.sites`` or ``observe[1].axis``.
    value : object
        The offending value.
    allowed : str
        Human-readable description of what is allowed.
    source : str
        File name or ``"<dict>"``.
    """

    def __init__(self, path: str, value: Any, allowed: str, source: str = "<dict>"):
        self.path = path
        self.value = value
        self.allowed = allowed
        self.source = source
        msg = f"scenario field '{path}': got {_show(value)}; allowed: {allowed}"
        if source and source != "<dict>":
            msg += f" (in {source})"
        super().__init__(msg)

    def __reduce__(self):  # keep the error picklable (e.g. across worker processes)
        return (type(self), (self.path, self.value, self.allowed, self.source))


class _Missing:
    """Marker for a required key that is absent (shown as such in error messages)."""

    def __repr__(self) -> str:
        return "nothing (the key is missing)"


MISSING = _Missing()


def _show(value: Any, limit: int = 80) -> str:
    try:
        text = repr(value)
    except Exception:  # pragma: no cover - exotic objects
        text = f"<{type(value).__name__}>"
    if len(text) > limit:
        text = text[: limit - 3] + "..."
    return text


# ---------------------------------------------------------------------------- dataclasses
@dataclass(frozen=True)
class Chain:
    """The lattice: ``sites`` spins on a line, ``boundary`` 'periodic' (ring) or 'open'."""

    sites: int
    boundary: str

    @property
    def periodic(self) -> bool:
        return self.boundary == "periodic"


@dataclass(frozen=True)
class ModelPreset:
    """A built-in model and its parameters (as given, plus defaults and any drawn seed).

    Attributes
    ----------
    name : str
        One of ``j1j2_ring``, ``mixed_field_ising``, ``random_field_heisenberg``, ``xx_chain``.
    params : tuple of (str, float | int)
        Parameter name/value pairs, sorted by name.
    """

    name: str
    params: tuple[tuple[str, float | int], ...]

    def param(self, key: str) -> float | int:
        return dict(self.params)[key]


@dataclass(frozen=True)
class Start:
    """Initial product state.

    Attributes
    ----------
    state : str
        'neel' (site 0 up: bits 1010...), 'domain_wall' (sites 0..L/2-1 up), 'bits' or 'tilted'.
    bits : str or None
        For 'bits': character j is site j, '1' = up.
    theta, phi : float, tuple of float, or None
        For 'tilted': polar angle(s) from +z and azimuth(s); the spinor on site j is
        cos(theta_j/2)|up> + exp(i phi_j) sin(theta_j/2)|down>.
    """

    state: str
    bits: str | None = None
    theta: float | tuple[float, ...] | None = None
    phi: float | tuple[float, ...] | None = None

    def angles(self, n_sites: int) -> tuple[np.ndarray, np.ndarray]:
        """(theta_j, phi_j) arrays for a tilted start."""
        th = np.broadcast_to(np.asarray(self.theta, dtype=float), (n_sites,)).copy()
        ph = np.broadcast_to(np.asarray(0.0 if self.phi is None else self.phi, dtype=float), (n_sites,)).copy()
        return th, ph

    def basis_bits(self, n_sites: int) -> int | None:
        """The z-basis state as an L-bit integer (bit j = 1: site j up), or None if not one."""
        if self.state == "neel":
            return sum(1 << j for j in range(0, n_sites, 2))
        if self.state == "domain_wall":
            return (1 << (n_sites // 2)) - 1
        if self.state == "bits":
            return sum(1 << j for j, ch in enumerate(self.bits) if ch == "1")
        th, _ = self.angles(n_sites)
        up = np.abs(np.sin(th / 2)) < 1e-12
        down = np.abs(np.cos(th / 2)) < 1e-12
        if np.all(up | down):
            return sum(1 << j for j in range(n_sites) if up[j])
        return None


@dataclass(frozen=True)
class ObservableSpec:
    """One requested observable (see ``docs/scenario.md``).

    Attributes
    ----------
    name : str
    kind : str
        'site' (sigma^axis_site), 'sum' (sum_j s_j sigma^axis_j / norm), 'zz'
        (sigma^z_i sigma^z_{i+distance}, or its mean over all such pairs) or 'bond' (energy of one bond).
    axis : str or None
        'x', 'y' or 'z' for site and sum.
    site : int, 'average' or None
        For site (an int) and zz.
    signs : 'uniform', 'staggered', tuple of float, or None
        For sum.
    normalize : bool or None
        For sum: divide by L.
    distance : int or None
        For zz.
    sites : tuple of two ints or None
        For bond.
    """

    name: str
    kind: str
    axis: str | None = None
    site: int | str | None = None
    signs: str | tuple[float, ...] | None = None
    normalize: bool | None = None
    distance: int | None = None
    sites: tuple[int, int] | None = None

    def sign_values(self, n_sites: int) -> np.ndarray:
        """The weights s_j of a 'sum' observable (before normalization)."""
        if self.signs == "uniform":
            return np.ones(n_sites)
        if self.signs == "staggered":
            return 1.0 - 2.0 * (np.arange(n_sites) % 2)
        return np.array(self.signs, dtype=float)


@dataclass(frozen=True)
class TimeGrid:
    """Output times 0, dt, 2 dt, ... up to t_max: exactly one of ``points`` or ``step`` is set.

    ``window_start`` (optional, time units, 0 <= window_start < t_max): start of the late window whose
    time average gives the equilibrium value and temporal variance; None means the last half of the run.
    """

    t_max: float
    points: int | None = None
    step: float | None = None
    window_start: float | None = None

    @property
    def n_points(self) -> int:
        if self.points is not None:
            return self.points
        return int(math.floor(self.t_max / self.step * (1 + 1e-12))) + 1

    def times(self) -> np.ndarray:
        """The output times (including t = 0)."""
        if self.points is not None:
            return np.linspace(0.0, self.t_max, self.points)
        return self.step * np.arange(self.n_points)


@dataclass(frozen=True)
class Sector:
    """Requested magnetization sector: 'auto' (let the program choose) or a number of up spins."""

    up_spins: int | str = "auto"


@dataclass(frozen=True)
class Numerics:
    """Engine settings: propagation tolerance, method and checkpoint interval (seconds)."""

    tolerance: float = 1e-10
    method: str = "chebyshev"
    checkpoint_seconds: float = 300.0


@dataclass(frozen=True)
class Scenario:
    """A complete, validated scenario.

    ``couplings``, ``bonds`` and ``fields`` always hold the *resolved* Hamiltonian: a preset is
    expanded into them at load time, so model building has one code path.  ``model`` keeps the
    preset (or None) for provenance and for writing the scenario back.
    """

    title: str
    chain: Chain
    model: ModelPreset | None
    couplings: tuple[Coupling, ...]
    bonds: tuple[Bond, ...]
    fields: tuple[Field, ...]
    start: Start
    observables: tuple[ObservableSpec, ...]
    time: TimeGrid
    sector: Sector = Sector()
    numerics: Numerics = Numerics()
    source: str = field(default="<dict>", compare=False)

    @property
    def n_sites(self) -> int:
        return self.chain.sites

    def field_values(self) -> dict[str, np.ndarray]:
        """Per-site field arrays {axis: h_j} for every axis that has a field (S units)."""
        return {f.axis: f.site_values(self.n_sites) for f in self.fields}

    def resolved_bonds(self) -> list[tuple[int, int, float, float, float]]:
        """Every two-spin term as (i, j, Jx, Jy, Jz), couplings expanded over the chain.

        For range r: bonds (j, j + r) for j = 0 .. L-1-r (open); on a ring (j, (j + r) mod L)
        for j = 0 .. L-1, except r = L/2 where only j < L/2 (each pair once).
        """
        L = self.n_sites
        out = []
        for c in self.couplings:
            for i, j in _range_pairs(L, c.range, self.chain.periodic):
                out.append((i, j, c.x, c.y, c.z))
        for b in self.bonds:
            out.append((b.sites[0], b.sites[1], b.x, b.y, b.z))
        return out

    def with_length(self, n_sites: int) -> "Scenario":
        """The same scenario at chain length ``n_sites``.

        Patterns (Néel, domain wall, uniform/staggered/random fields, scalar tilt angles,
        uniform/staggered signs, averaged correlations) scale; explicit bit strings, bond lists,
        per-site lists and explicit field values cannot and raise :class:`ScenarioError`.  An
        explicit ``sector.up_spins`` equal to the start's number of up spins is re-derived.
        """
        if self.bonds:
            raise ScenarioError("bond", [list(b.sites) for b in self.bonds],
                                "no explicit bonds when changing the chain length", self.source)
        if self.start.state == "bits":
            raise ScenarioError("start.bits", self.start.bits,
                                "a pattern start (neel, domain_wall, tilted) when changing the chain length",
                                self.source)
        for key in ("theta", "phi"):
            if isinstance(getattr(self.start, key), tuple):
                raise ScenarioError(f"start.{key}", list(getattr(self.start, key)),
                                    "a single angle when changing the chain length", self.source)
        for f in self.fields:
            if f.pattern == "values":
                raise ScenarioError(f"field.{f.axis}.values", list(f.values),
                                    "a pattern field when changing the chain length", self.source)
        for k, o in enumerate(self.observables):
            if isinstance(o.signs, tuple):
                raise ScenarioError(f"observe[{k}].signs", list(o.signs),
                                    "'uniform' or 'staggered' when changing the chain length", self.source)
        data = scenario_to_dict(self)
        data["chain"]["sites"] = n_sites
        up = self.sector.up_spins
        if isinstance(up, int):
            old = self.start.basis_bits(self.n_sites)
            if old is not None and old.bit_count() == up and isinstance(n_sites, int) \
                    and not isinstance(n_sites, bool) and MIN_SITES <= n_sites <= MAX_SITES:
                new = self.start.basis_bits(n_sites)
                if new is not None:
                    data["sector"]["up_spins"] = new.bit_count()
        return parse_scenario(data, source=self.source)


def _range_pairs(L: int, r: int, periodic: bool) -> list[tuple[int, int]]:
    if not periodic:
        return [(j, j + r) for j in range(L - r)]
    count = L // 2 if 2 * r == L else L
    return [(j, (j + r) % L) for j in range(count)]


# ---------------------------------------------------------------------------- checking helpers
class _Ctx:
    def __init__(self, source: str):
        self.source = source

    def fail(self, path: str, value: Any, allowed: str):
        raise ScenarioError(path, value, allowed, self.source)

    def table(self, value: Any, path: str) -> dict:
        if not isinstance(value, dict):
            self.fail(path, value, "a table (key = value pairs)")
        for k in value:
            if not isinstance(k, str):
                self.fail(path, k, "string keys")
        return value

    def keys(self, table: dict, path: str, allowed: tuple[str, ...] | list[str]):
        for k in table:
            if k not in allowed:
                hint = difflib.get_close_matches(k, list(allowed), n=1)
                extra = f" (did you mean '{hint[0]}'?)" if hint else ""
                p = f"{path}.{k}" if path else k
                self.fail(p, k, f"one of the keys {', '.join(sorted(allowed))}{extra}")

    def integer(self, value: Any, path: str, lo: int | None = None, hi: int | None = None) -> int:
        ok = isinstance(value, int) and not isinstance(value, bool)
        if ok and lo is not None and value < lo:
            ok = False
        if ok and hi is not None and value > hi:
            ok = False
        if not ok:
            if lo is not None and hi is not None:
                what = f"an integer between {lo} and {hi}"
            elif lo is not None:
                what = f"an integer >= {lo}"
            else:
                what = "an integer"
            self.fail(path, value, what)
        return int(value)

    def number(self, value: Any, path: str, *, positive: bool = False, nonneg: bool = False,
               hi: float | None = None, what: str | None = None, bound: float | None = None) -> float:
        desc = what or ("a finite number" + (" > 0" if positive else " >= 0" if nonneg else "")
                        + (f" and <= {hi:g}" if hi is not None else "")
                        + (f" with magnitude <= {bound:g}" if bound is not None else ""))
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            self.fail(path, value, desc)
        try:
            x = float(value)
        except (OverflowError, ValueError):
            self.fail(path, value, desc)
        if not math.isfinite(x) or (positive and x <= 0) or (nonneg and x < 0) or (hi is not None and x > hi) \
                or (bound is not None and abs(x) > bound):
            self.fail(path, value, desc)
        return x

    def choice(self, value: Any, path: str, options: tuple[str, ...]) -> str:
        if not isinstance(value, str) or value not in options:
            hint = ""
            if isinstance(value, str):
                m = difflib.get_close_matches(value, list(options), n=1)
                hint = f" (did you mean '{m[0]}'?)" if m else ""
            self.fail(path, value, "one of " + ", ".join(repr(o) for o in options) + hint)
        return value

    def boolean(self, value: Any, path: str) -> bool:
        if not isinstance(value, bool):
            self.fail(path, value, "true or false")
        return value

    def number_list(self, value: Any, path: str, length: int, what: str,
                    bound: float | None = None) -> tuple[float, ...]:
        if not isinstance(value, list) or len(value) != length:
            self.fail(path, value, f"{what} or a list of exactly {length} numbers (one per site)")
        return tuple(self.number(v, f"{path}[{i}]", bound=bound) for i, v in enumerate(value))

    def site_pair(self, value: Any, path: str, L: int) -> tuple[int, int]:
        allowed = f"a list of two different site numbers between 0 and {L - 1}"
        if not isinstance(value, list) or len(value) != 2:
            self.fail(path, value, allowed)
        i = self.integer(value[0], f"{path}[0]", 0, L - 1)
        j = self.integer(value[1], f"{path}[1]", 0, L - 1)
        if i == j:
            self.fail(path, value, allowed)
        return (i, j)


_TOP_KEYS = ("title", "chain", "model", "coupling", "bond", "field", "start", "observe", "time",
             "sector", "numerics")
_COUPLING_KEYS = ("xy", "zz", "x", "y", "z")

# preset name -> {param: default or None (required)}
PRESET_PARAMS: dict[str, dict[str, float | None]] = {
    "j1j2_ring": {"j1": 1.0, "j2": 0.0, "delta1": 1.0, "delta2": 1.0},
    "mixed_field_ising": {"j": 1.0, "g": -1.05, "h": 0.5},
    "random_field_heisenberg": {"j": 1.0, "w": None, "seed": None},
    "xx_chain": {"j": 1.0},
}


def _draw_seed() -> int:
    return secrets.randbits(62)


# ---------------------------------------------------------------------------- parsing
def parse_scenario(data: Any, *, source: str = "<dict>") -> Scenario:
    """Validate a scenario given as nested dicts (as ``tomllib`` returns) and build it.

    Parameters
    ----------
    data : dict
        The scenario; see ``docs/scenario.md`` for the keys.
    source : str
        Where it came from (used in error messages).

    Returns
    -------
    Scenario

    Raises
    ------
    ScenarioError
        On any malformed or inconsistent entry; the message names the field path, the bad
        value and what is allowed.
    """

    ctx = _Ctx(source)
    data = ctx.table(data, "(top level)")
    ctx.keys(data, "", _TOP_KEYS)

    title = data.get("title", "")
    if not isinstance(title, str):
        ctx.fail("title", title, "a text string")

    # ---- chain
    if "chain" not in data:
        ctx.fail("chain", MISSING, "a [chain] table with 'sites' (and optionally 'boundary')")
    chain_t = ctx.table(data["chain"], "chain")
    ctx.keys(chain_t, "chain", ("sites", "boundary"))
    if "sites" not in chain_t:
        ctx.fail("chain.sites", MISSING, f"an integer between {MIN_SITES} and {MAX_SITES} (required)")
    L = ctx.integer(chain_t["sites"], "chain.sites", MIN_SITES, MAX_SITES)
    boundary = ctx.choice(chain_t.get("boundary", "periodic"), "chain.boundary", BOUNDARIES)
    chain = Chain(L, boundary)
    periodic = chain.periodic

    # ---- model preset or explicit terms
    model = None
    couplings: list[Coupling] = []
    bonds: list[Bond] = []
    fields: list[Field] = []
    if "model" in data:
        model_t = ctx.table(data["model"], "model")
        for other in ("coupling", "bond", "field"):
            if other in data:
                ctx.fail(other, data[other],
                         "no explicit couplings, bonds or fields together with [model] preset "
                         "(a preset defines the whole Hamiltonian; write it out explicitly instead)")
        if "preset" not in model_t:
            ctx.fail("model.preset", MISSING, "one of " + ", ".join(repr(p) for p in PRESETS))
        name = ctx.choice(model_t["preset"], "model.preset", PRESETS)
        spec = PRESET_PARAMS[name]
        ctx.keys(model_t, "model", ("preset",) + tuple(spec))
        params: dict[str, float | int] = {}
        for key, default in spec.items():
            path = f"model.{key}"
            if key == "seed":
                if key in model_t:
                    params[key] = ctx.integer(model_t[key], path, 0, MAX_SEED)
                else:
                    params[key] = _draw_seed()
            elif key in model_t:
                params[key] = ctx.number(model_t[key], path, nonneg=(key == "w"), bound=MAX_STRENGTH)
            elif default is None:
                ctx.fail(path, MISSING, f"a number between 0 and {MAX_STRENGTH:g} (required for this preset)")
            else:
                params[key] = float(default)
        model = ModelPreset(name, tuple(sorted(params.items())))
        couplings, fields = _presets.expand(name, params)
        for c in couplings:
            need = 2 * c.range if periodic else c.range + 1
            if L < need:
                ctx.fail("chain.sites", L, f"at least {need} sites for the range-{c.range} couplings of "
                         f"preset '{name}' on a {boundary} chain")
    else:
        if "coupling" in data:
            lst = data["coupling"]
            if not isinstance(lst, list):
                ctx.fail("coupling", lst, "an array of tables [[coupling]]")
            for k, item in enumerate(lst):
                p = f"coupling[{k}]"
                t = ctx.table(item, p)
                ctx.keys(t, p, ("range",) + _COUPLING_KEYS)
                if "range" not in t:
                    ctx.fail(f"{p}.range", MISSING, "an integer >= 1 (required)")
                r = ctx.integer(t["range"], f"{p}.range", 1)
                hi = L // 2 if periodic else L - 1
                if r > hi:
                    ctx.fail(f"{p}.range", r, f"an integer between 1 and {hi} for a {boundary} chain of {L} sites")
                x, y, z, style = _coupling_values(ctx, t, p)
                couplings.append(Coupling(r, x, y, z, style))
        if "bond" in data:
            lst = data["bond"]
            if not isinstance(lst, list):
                ctx.fail("bond", lst, "an array of tables [[bond]]")
            for k, item in enumerate(lst):
                p = f"bond[{k}]"
                t = ctx.table(item, p)
                ctx.keys(t, p, ("sites",) + _COUPLING_KEYS)
                if "sites" not in t:
                    ctx.fail(f"{p}.sites", MISSING, "a list of two different sites (required)")
                pair = ctx.site_pair(t["sites"], f"{p}.sites", L)
                x, y, z, style = _coupling_values(ctx, t, p)
                bonds.append(Bond(pair, x, y, z, style))
        if "field" in data:
            ft = ctx.table(data["field"], "field")
            ctx.keys(ft, "field", FIELD_AXES)
            for axis in FIELD_AXES:
                if axis in ft:
                    fields.append(_parse_field(ctx, ft[axis], f"field.{axis}", axis, chain))
        if not couplings and not bonds and not fields:
            ctx.fail("coupling", MISSING, "a [model] preset or at least one [[coupling]], [[bond]] or [field.*]")

    # empty Hamiltonian check (all strengths zero)
    nonzero = any(c.x or c.y or c.z for c in couplings) or any(b.x or b.y or b.z for b in bonds) \
        or any(np.any(f.site_values(L) != 0) for f in fields)
    if not nonzero:
        where = "model" if model is not None else "coupling"
        ctx.fail(where, "all couplings and fields are zero", "a Hamiltonian with at least one nonzero term")

    # ---- start
    if "start" not in data:
        ctx.fail("start", MISSING, "a [start] table with 'state'")
    start = _parse_start(ctx, ctx.table(data["start"], "start"), chain)

    # ---- observables
    if "observe" not in data:
        ctx.fail("observe", MISSING, "at least one [[observe]] table")
    obs_list = data["observe"]
    if not isinstance(obs_list, list) or not obs_list:
        ctx.fail("observe", obs_list, "a non-empty array of tables [[observe]]")
    bond_pairs = {}
    for (i, j, jx, jy, jz) in _resolved_pairs(L, periodic, couplings, bonds):
        key = (min(i, j), max(i, j))
        bond_pairs[key] = bond_pairs.get(key, False) or bool(jx or jy or jz)
    observables = []
    seen: set[str] = set()
    for k, item in enumerate(obs_list):
        o = _parse_observable(ctx, item, f"observe[{k}]", chain, bond_pairs)
        if o.name in seen:
            ctx.fail(f"observe[{k}].name", o.name, "a name not used by another observable")
        seen.add(o.name)
        observables.append(o)

    # ---- time
    if "time" not in data:
        ctx.fail("time", MISSING, "a [time] table with t_max and points or step")
    time = _parse_time(ctx, ctx.table(data["time"], "time"))

    # ---- sector
    sector = Sector()
    if "sector" in data:
        st = ctx.table(data["sector"], "sector")
        ctx.keys(st, "sector", ("up_spins",))
        up = st.get("up_spins", "auto")
        if isinstance(up, str):
            if up != "auto":
                ctx.fail("sector.up_spins", up, f"'auto' or an integer between 0 and {L}")
        else:
            up = ctx.integer(up, "sector.up_spins", 0, L)
            breakers = _magnetization_breakers(couplings, bonds, fields, L)
            if breakers:
                ctx.fail("sector.up_spins", up,
                         f"'auto' only, because {breakers} breaks magnetization conservation")
            b0 = start.basis_bits(L)
            if b0 is None:
                ctx.fail("sector.up_spins", up,
                         "'auto' only: the initial state has no definite number of up spins")
            if b0.bit_count() != up:
                ctx.fail("sector.up_spins", up,
                         f"'auto' or {b0.bit_count()} (the number of up spins of the initial state)")
        sector = Sector(up)

    # ---- numerics
    numerics = Numerics()
    if "numerics" in data:
        nt = ctx.table(data["numerics"], "numerics")
        ctx.keys(nt, "numerics", ("tolerance", "method", "checkpoint_seconds"))
        tol = nt.get("tolerance", numerics.tolerance)
        tol = ctx.number(tol, "numerics.tolerance", positive=True, hi=0.1,
                         what="a number between 0 (exclusive) and 0.1")
        method = ctx.choice(nt.get("method", numerics.method), "numerics.method", METHODS)
        cps = ctx.number(nt.get("checkpoint_seconds", numerics.checkpoint_seconds),
                         "numerics.checkpoint_seconds", positive=True)
        numerics = Numerics(tol, method, cps)

    return Scenario(title, chain, model, tuple(couplings), tuple(bonds), tuple(fields), start,
                    tuple(observables), time, sector, numerics, source)


def _resolved_pairs(L, periodic, couplings, bonds):
    for c in couplings:
        for i, j in _range_pairs(L, c.range, periodic):
            yield (i, j, c.x, c.y, c.z)
    for b in bonds:
        yield (b.sites[0], b.sites[1], b.x, b.y, b.z)


def _magnetization_breakers(couplings, bonds, fields, L) -> str:
    for f in fields:
        if f.axis in ("x", "y") and np.any(f.site_values(L) != 0):
            return f"the {f.axis} field"
    for k, c in enumerate(couplings):
        if c.x != c.y:
            return f"coupling[{k}] (x != y)"
    for k, b in enumerate(bonds):
        if b.x != b.y:
            return f"bond[{k}] (x != y)"
    return ""


def _coupling_values(ctx: _Ctx, t: dict, p: str) -> tuple[float, float, float, str]:
    xxz = [k for k in ("xy", "zz") if k in t]
    xyz = [k for k in ("x", "y", "z") if k in t]
    if xxz and xyz:
        ctx.fail(f"{p}.{xyz[0]}", t[xyz[0]],
                 f"either xy/zz or x/y/z, not both (this entry also has '{xxz[0]}')")
    if not xxz and not xyz:
        ctx.fail(p, t, "at least one of the strengths xy, zz (XXZ) or x, y, z (XYZ)")
    vals = {k: ctx.number(t[k], f"{p}.{k}", bound=MAX_STRENGTH) for k in xxz + xyz}
    if xxz:
        xy = vals.get("xy", 0.0)
        return xy, xy, vals.get("zz", 0.0), "xxz"
    return vals.get("x", 0.0), vals.get("y", 0.0), vals.get("z", 0.0), "xyz"


def _parse_field(ctx: _Ctx, value: Any, p: str, axis: str, chain: Chain) -> Field:
    t = ctx.table(value, p)
    ctx.keys(t, p, ("pattern", "strength", "seed", "values"))
    pattern = ctx.choice(t.get("pattern", "uniform"), f"{p}.pattern", FIELD_PATTERNS)
    L = chain.sites
    if pattern == "values":
        for bad in ("strength", "seed"):
            if bad in t:
                ctx.fail(f"{p}.{bad}", t[bad], "no 'strength' or 'seed' with pattern 'values'")
        if "values" not in t:
            ctx.fail(f"{p}.values", MISSING, f"a list of {L} numbers (required for pattern 'values')")
        vals = ctx.number_list(t["values"], f"{p}.values", L, "for pattern 'values'", bound=MAX_STRENGTH)
        return Field(axis, pattern, 0.0, None, vals)
    if "values" in t:
        ctx.fail(f"{p}.values", t["values"], "'values' only with pattern = 'values'")
    if "strength" not in t:
        ctx.fail(f"{p}.strength", MISSING, "a finite number (required)")
    strength = ctx.number(t["strength"], f"{p}.strength", nonneg=(pattern == "random"), bound=MAX_STRENGTH)
    seed = None
    if pattern == "random":
        seed = ctx.integer(t["seed"], f"{p}.seed", 0, MAX_SEED) if "seed" in t else _draw_seed()
    elif "seed" in t:
        ctx.fail(f"{p}.seed", t["seed"], "'seed' only with pattern = 'random'")
    if pattern == "staggered" and chain.periodic and L % 2:
        ctx.fail("chain.sites", L, "an even number of sites for a staggered field on a periodic chain")
    return Field(axis, pattern, strength, seed, None)


def _parse_start(ctx: _Ctx, t: dict, chain: Chain) -> Start:
    L = chain.sites
    ctx.keys(t, "start", ("state", "bits", "theta", "phi"))
    if "state" not in t:
        ctx.fail("start.state", MISSING, "one of " + ", ".join(repr(s) for s in START_STATES))
    state = ctx.choice(t["state"], "start.state", START_STATES)
    extra = {"neel": (), "domain_wall": (), "bits": ("bits",), "tilted": ("theta", "phi")}[state]
    for k in ("bits", "theta", "phi"):
        if k in t and k not in extra:
            ctx.fail(f"start.{k}", t[k], f"no '{k}' with state = '{state}'")
    if state in ("neel", "domain_wall"):
        if L % 2:
            ctx.fail("chain.sites", L, f"an even number of sites for the '{state}' start")
        return Start(state)
    if state == "bits":
        bits = t.get("bits")
        if not isinstance(bits, str) or len(bits) != L or set(bits) - {"0", "1"}:
            ctx.fail("start.bits", bits, f"a string of exactly {L} characters '0'/'1' (character j = site j, '1' = up)")
        return Start(state, bits=bits)
    if "theta" not in t:
        ctx.fail("start.theta", MISSING, "a polar angle in radians, or a list of one per site (required)")
    angles = []
    for k in ("theta", "phi"):
        v = t.get(k, 0.0)
        if isinstance(v, list):
            angles.append(ctx.number_list(v, f"start.{k}", L, "an angle in radians"))
        else:
            angles.append(ctx.number(v, f"start.{k}", what="a finite angle in radians, or a list of one per site"))
    return Start(state, theta=angles[0], phi=angles[1])


def _parse_observable(ctx: _Ctx, item: Any, p: str, chain: Chain, bond_pairs: dict) -> ObservableSpec:
    L = chain.sites
    t = ctx.table(item, p)
    if "name" not in t:
        ctx.fail(f"{p}.name", MISSING, "a name made of letters, digits and '_' (required)")
    name = t["name"]
    if not isinstance(name, str) or not _NAME_RE.fullmatch(name):
        ctx.fail(f"{p}.name", name, "a non-empty name made of letters, digits and '_'")
    if "kind" not in t:
        ctx.fail(f"{p}.kind", MISSING, "one of " + ", ".join(repr(k) for k in OBSERVABLE_KINDS))
    kind = ctx.choice(t["kind"], f"{p}.kind", OBSERVABLE_KINDS)
    per_kind = {"site": ("axis", "site"), "sum": ("axis", "signs", "normalize"),
                "zz": ("site", "distance"), "bond": ("sites",)}[kind]
    ctx.keys(t, p, ("name", "kind") + per_kind)
    if kind == "site":
        axis = ctx.choice(t.get("axis", "z"), f"{p}.axis", OBS_AXES)
        if "site" not in t:
            ctx.fail(f"{p}.site", MISSING, f"an integer between 0 and {L - 1} (required)")
        site = ctx.integer(t["site"], f"{p}.site", 0, L - 1)
        return ObservableSpec(name, kind, axis=axis, site=site)
    if kind == "sum":
        axis = ctx.choice(t.get("axis", "z"), f"{p}.axis", OBS_AXES)
        signs = t.get("signs", "uniform")
        if isinstance(signs, list):
            signs = ctx.number_list(signs, f"{p}.signs", L, "'uniform', 'staggered'", bound=MAX_STRENGTH)
            if not any(signs):
                ctx.fail(f"{p}.signs", list(signs), "a list with at least one nonzero weight")
        else:
            if not isinstance(signs, str):
                ctx.fail(f"{p}.signs", signs, f"'uniform', 'staggered' or a list of exactly {L} numbers")
            signs = ctx.choice(signs, f"{p}.signs", ("uniform", "staggered"))
        normalize = ctx.boolean(t.get("normalize", True), f"{p}.normalize")
        return ObservableSpec(name, kind, axis=axis, signs=signs, normalize=normalize)
    if kind == "zz":
        hi = L // 2 if chain.periodic else L - 1
        r = ctx.integer(t.get("distance", 1), f"{p}.distance", 1, hi)
        site = t.get("site", "average")
        if isinstance(site, str):
            ctx.choice(site, f"{p}.site", ("average",))
        else:
            top = L - 1 if chain.periodic else L - 1 - r
            site = ctx.integer(site, f"{p}.site", 0, top)
        return ObservableSpec(name, kind, site=site, distance=r)
    # bond
    if "sites" not in t:
        ctx.fail(f"{p}.sites", MISSING, "a list of two sites joined by a Hamiltonian bond (required)")
    pair = ctx.site_pair(t["sites"], f"{p}.sites", L)
    key = (min(pair), max(pair))
    if not bond_pairs.get(key, False):
        ctx.fail(f"{p}.sites", list(pair), "two sites joined by a nonzero coupling of the Hamiltonian")
    return ObservableSpec(name, kind, sites=pair)


def _parse_time(ctx: _Ctx, t: dict) -> TimeGrid:
    ctx.keys(t, "time", ("t_max", "points", "step", "window_start"))
    if "t_max" not in t:
        ctx.fail("time.t_max", MISSING, "a finite number > 0 (required)")
    t_max = ctx.number(t["t_max"], "time.t_max", positive=True, hi=MAX_TIME)
    has_p, has_s = "points" in t, "step" in t
    if has_p == has_s:
        ctx.fail("time.points" if has_p else "time", {k: t[k] for k in ("points", "step") if k in t},
                 "exactly one of 'points' or 'step'")
    ws = None
    if "window_start" in t:
        ws = ctx.number(t["window_start"], "time.window_start", nonneg=True,
                        what=f"a finite number >= 0 and < t_max = {t_max:g}")
        if not ws < t_max:
            ctx.fail("time.window_start", t["window_start"], f"a finite number >= 0 and < t_max = {t_max:g}")
    if has_p:
        pts = ctx.integer(t["points"], "time.points", 2, MAX_POINTS)
        return TimeGrid(t_max, points=pts, window_start=ws)
    step = ctx.number(t["step"], "time.step", positive=True, hi=t_max,
                      what=f"a finite number > 0 and <= t_max = {t_max:g}")
    grid = TimeGrid(t_max, step=step, window_start=ws)
    if t_max / step > MAX_POINTS:
        ctx.fail("time.step", step, f"a step giving at most {MAX_POINTS} output times")
    return grid


# ---------------------------------------------------------------------------- I/O
def load_scenario(path: str | Path) -> Scenario:
    """Read and validate a scenario TOML file.

    Raises
    ------
    ScenarioError
        If the file is missing, not valid TOML, or malformed.
    """
    path = Path(path)
    try:
        raw = path.read_bytes()
    except OSError as exc:
        raise ScenarioError("(file)", str(path), f"a readable TOML file ({exc.strerror or exc})", str(path)) from None
    try:
        data = tomllib.loads(raw.decode("utf-8"))
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise ScenarioError("(TOML syntax)", str(exc), "valid TOML 1.0", str(path)) from None
    return parse_scenario(data, source=str(path))


def _coupling_dict(style: str, x: float, y: float, z: float) -> dict:
    if style == "xxz":
        return {"xy": x, "zz": z}
    return {"x": x, "y": y, "z": z}


def scenario_to_dict(scenario: Scenario) -> dict:
    """The scenario as nested dicts in the TOML schema (every default written out).

    ``parse_scenario(scenario_to_dict(s)) == s``; random seeds are included.
    """
    s = scenario
    d: dict[str, Any] = {"title": s.title,
                         "chain": {"sites": s.chain.sites, "boundary": s.chain.boundary}}
    if s.model is not None:
        d["model"] = {"preset": s.model.name, **dict(s.model.params)}
    else:
        if s.couplings:
            d["coupling"] = [{"range": c.range, **_coupling_dict(c.style, c.x, c.y, c.z)} for c in s.couplings]
        if s.bonds:
            d["bond"] = [{"sites": list(b.sites), **_coupling_dict(b.style, b.x, b.y, b.z)} for b in s.bonds]
        if s.fields:
            ft = {}
            for f in s.fields:
                e: dict[str, Any] = {"pattern": f.pattern}
                if f.pattern == "values":
                    e["values"] = list(f.values)
                else:
                    e["strength"] = f.strength
                if f.seed is not None:
                    e["seed"] = f.seed
                ft[f.axis] = e
            d["field"] = ft
    st: dict[str, Any] = {"state": s.start.state}
    if s.start.state == "bits":
        st["bits"] = s.start.bits
    if s.start.state == "tilted":
        for k in ("theta", "phi"):
            v = getattr(s.start, k)
            st[k] = list(v) if isinstance(v, tuple) else v
    d["start"] = st
    obs = []
    for o in s.observables:
        e = {"name": o.name, "kind": o.kind}
        if o.kind == "site":
            e.update(axis=o.axis, site=o.site)
        elif o.kind == "sum":
            e.update(axis=o.axis, signs=list(o.signs) if isinstance(o.signs, tuple) else o.signs,
                     normalize=o.normalize)
        elif o.kind == "zz":
            e.update(site=o.site, distance=o.distance)
        else:
            e.update(sites=list(o.sites))
        obs.append(e)
    d["observe"] = obs
    tm: dict[str, Any] = {"t_max": s.time.t_max}
    if s.time.points is not None:
        tm["points"] = s.time.points
    else:
        tm["step"] = s.time.step
    if s.time.window_start is not None:
        tm["window_start"] = s.time.window_start
    d["time"] = tm
    d["sector"] = {"up_spins": s.sector.up_spins}
    d["numerics"] = {"tolerance": s.numerics.tolerance, "method": s.numerics.method,
                     "checkpoint_seconds": s.numerics.checkpoint_seconds}
    return d


def scenario_to_toml(scenario: Scenario) -> str:
    """TOML text of the scenario (all defaults and seeds written out); round-trips through
    :func:`parse_scenario` / :func:`load_scenario`."""
    import tomli_w

    return tomli_w.dumps(scenario_to_dict(scenario))

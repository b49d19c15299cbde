"""The answer of a relaxation run in a few lines, shared by the console, summary.json and report.html.

:func:`relax_headline` reads a run's summary (the dict written to ``summary.json``) and returns
one line per observable (does it settle, to what, the diagonal ensemble, the thermal values,
the fluctuations against the bound, the relaxation time) followed by the effective dimension,
the cost and the drifts.  Every number on a line is a :class:`Cell` that remembers the
summary key it came from, so the HTML page can carry it (``data-key``) and a test can check
that what is printed is what was saved.

Numbers are printed to their precision: a value with an error bar is rounded to the error's
second significant digit; a value whose magnitude is below its stated accuracy prints as
``0`` (never ``-0.00000`` or ``1e-17``).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, Sequence

__all__ = ["Cell", "HeadlineLine", "EXACT_ACCURACY", "ENERGY_ACCURACY", "fmt", "fmt_error", "relax_headline",
           "hamiltonian_terms", "headline_text", "lookup", "basis_text"]

#: accuracy stated for numbers that come out of dense linear algebra (diagonal ensemble, exact
#: thermal values): anything smaller in magnitude is numerically zero and prints as 0
EXACT_ACCURACY = 1e-9
#: accuracy stated for <psi|H|psi> of the initial state (a sum of O(dimension) products in double precision:
#: roundoff ~1e-16 ||H||; common practice): smaller values print as 0
ENERGY_ACCURACY = 1e-12


def _finite(x: Any) -> bool:
    return isinstance(x, (int, float)) and not isinstance(x, bool) and math.isfinite(float(x))


def fmt(value: Any, accuracy: float | None = None, digits: int = 4) -> str:
    """``value`` to ``digits`` significant digits; ``0`` when ``|value| < accuracy``; ``n/a`` when missing.

    With an accuracy the value is also not printed with more decimals than the accuracy's
    second significant digit.
    """
    if value is None or not _finite(value):
        return "n/a"
    v = float(value)
    if accuracy is not None and accuracy > 0 and abs(v) < accuracy:
        return "0"
    if v == 0:
        return "0"
    if accuracy is not None and accuracy > 0:
        decimals = max(0, 1 - math.floor(math.log10(accuracy)))
        if abs(v) < 1e6 and decimals <= 8:
            lead = math.floor(math.log10(abs(v)))
            decimals = min(decimals, max(0, digits - 1 - lead))
            text = f"{v:.{decimals}f}"
            return "0" if float(text) == 0 else text
    text = f"{v:.{digits}g}"
    if "e" in text:
        mant, exp = text.split("e")
        return f"{mant}e{int(exp)}"
    return text


def fmt_error(value: Any, error: Any) -> str:
    """``value ± error`` with the error to 2 significant digits and the value rounded to match.

    A value smaller in magnitude than its error prints as ``0 ± error`` only when it also
    rounds to zero at that precision (no negative zero).
    """
    if value is None or not _finite(value):
        return "n/a"
    if error is None or not _finite(error) or float(error) <= 0:
        return fmt(value)
    v, e = float(value), abs(float(error))
    exp = math.floor(math.log10(e)) - 1
    if -8 <= exp <= 4 and abs(v) < 1e6:
        decimals = max(0, -exp)
        vt = f"{round(v, -exp):.{decimals}f}"
        if float(vt) == 0:
            vt = f"{0:.{decimals}f}"
        return f"{vt} ± {round(e, -exp):.{decimals}f}"
    return f"{fmt(v)} ± {fmt(e, digits=2)}"


@dataclass(frozen=True)
class Cell:
    """One printed number: its text, the summary key path it came from and the raw value."""

    text: str
    key: str | None = None
    value: float | None = None


@dataclass
class HeadlineLine:
    """One line of the headline: a label and a sequence of text pieces and cells."""

    label: str
    parts: list = field(default_factory=list)
    status: str = ""  # "settled", "not settled" or "" (CSS class on the page)

    def text(self) -> str:
        return "".join(p.text if isinstance(p, Cell) else str(p) for p in self.parts)

    def cells(self) -> list[Cell]:
        return [p for p in self.parts if isinstance(p, Cell)]


def lookup(summary: dict, key: str) -> Any:
    """The value at a dotted key path (``observables.zz_nn.equilibrium``; list items by index)."""
    node: Any = summary
    for part in _split_key(key):
        node = node[int(part)] if isinstance(node, list) else node[part]
    return node


def _split_key(key: str) -> list[str]:
    # observable names may hold dots: they are written between brackets, observables[a.b].equilibrium
    out, buf, depth = [], "", 0
    for ch in key:
        if ch == "[":
            depth += 1
            if depth == 1:
                if buf:
                    out.append(buf)
                buf = ""
                continue
        elif ch == "]":
            depth -= 1
            if depth == 0:
                out.append(buf)
                buf = ""
                continue
        elif ch == "." and depth == 0:
            if buf:
                out.append(buf)
            buf = ""
            continue
        buf += ch
    if buf:
        out.append(buf)
    return out


def _cell(summary: dict, key: str, text_fn) -> Cell:
    try:
        value = lookup(summary, key)
    except (KeyError, IndexError, TypeError):
        value = None
    return Cell(text_fn(value), key, value if _finite(value) else None)


def _obs_key(name: str, field_name: str) -> str:
    return f"observables[{name}].{field_name}"


def _sig(x: float) -> str:
    return fmt(x, digits=3)


def relax_headline(summary: dict) -> list[HeadlineLine]:
    """The headline of a relaxation run, built from its summary dict (see the module docstring)."""
    lines: list[HeadlineLine] = []
    eq = summary.get("equilibration") or {}
    for name, o in (summary.get("observables") or {}).items():
        k = lambda f: _obs_key(name, f)  # noqa: E731
        settled = bool(o.get("settled"))
        if settled:
            parts: list = ["settles at "]
        elif o.get("status") == "undecided":
            parts = ["undecided (no drift, but the window is too short for a reliable error bar: run longer); "
                     "late-window mean "]
        else:
            parts = ["does NOT settle within the run; late-window mean "]
        err = o.get("equilibrium_err")
        parts.append(Cell(fmt_error(o.get("equilibrium"), err), k("equilibrium"), o.get("equilibrium")))
        t_relax = o.get("relaxation_time")
        if settled and _finite(t_relax):
            parts += [" after t ≈ ", _cell(summary, k("relaxation_time"), _sig)]
        elif settled:
            parts.append(" (relaxation time: n/a)")
        if o.get("diagonal_ensemble") is not None:
            parts += ["; diagonal ensemble ", _cell(summary, k("diagonal_ensemble"), lambda v: fmt(v, EXACT_ACCURACY, 5))]
        thermal_bits = []
        for key_name, label in (("canonical", "canonical"), ("microcanonical", "microcanonical")):
            if o.get(key_name) is None:
                continue
            cerr = o.get(f"{key_name}_err")
            if _finite(cerr) and cerr > 0:
                thermal_bits.append((label, Cell(fmt_error(o[key_name], cerr), k(key_name), o[key_name])))
            else:
                thermal_bits.append((label, _cell(summary, k(key_name), lambda v: fmt(v, EXACT_ACCURACY, 5))))
        for i, (label, cell) in enumerate(thermal_bits):
            parts += [("; " if i == 0 else ", ") + label + " ", cell]
        thermal = _thermal_verdict(o)
        if thermal:
            parts.append(f" ({thermal})")
        var = o.get("temporal_variance")
        if _finite(var):
            parts += ["; σ = ", Cell(_sig(math.sqrt(max(float(var), 0.0))), k("temporal_variance"), var)]
            ratio = o.get("measured_variance_over_bound")
            if _finite(ratio):
                parts += [", σ²/bound = ", _cell(summary, k("measured_variance_over_bound"), _sig)]
        kc = o.get("known_curve")
        if kc and _finite(kc.get("max_deviation_until_valid")):
            parts += [f"; follows {kc['formula']} within ",
                      _cell(summary, k("known_curve.max_deviation_until_valid"), lambda v: fmt(v, digits=2)),
                      " up to t = ", _cell(summary, k("known_curve.valid_until"), _sig)]
        lines.append(HeadlineLine(name, parts, "settled" if settled else "not settled"))
    d = eq.get("d_eff")
    if _finite(d):
        lo, hi = (eq.get("d_eff_range") or [d, d])[:2]
        parts = [_cell(summary, "equilibration.d_eff", lambda v: fmt(v, digits=4))]
        if _finite(lo) and _finite(hi) and lo != hi:
            parts += [" (range ", _cell(summary, "equilibration.d_eff_range.0", _sig), " .. ",
                      _cell(summary, "equilibration.d_eff_range.1", _sig), ")"]
        parts.append(f" from {eq.get('method', '?')}")
        if eq.get("method") == "exact diagonalization" and (eq.get("details") or {}).get("diagonalized_dimension"):
            parts += [" of the initial state's symmetric subspace (", _cell(summary, "equilibration.details.diagonalized_dimension", lambda v: f"{int(v):,}"), " states)"]
        elif eq.get("reliable") is False:
            parts.append(" (flagged unreliable: " + "; ".join(eq.get("warnings") or []) + ")")
        lines.append(HeadlineLine("d_eff", parts))
    else:
        lines.append(HeadlineLine("d_eff", [eq.get("note") or eq.get("exact_note") or "not computed"]))
    # the evolution phase (fixed once the curves exist: the same number on the page and in the final
    # summary.json, whose wall_seconds also covers the report written after the page); runs without the
    # phase record show the whole wall time
    evo_key = "phase_seconds[evolution]" if _finite((summary.get("phase_seconds") or {}).get("evolution")) else "wall_seconds"
    cost = [_cell(summary, "matvecs", lambda v: f"{int(v):,}" if _finite(v) else "n/a"),
            " matrix-vector products; evolution ", _cell(summary, evo_key, lambda v: fmt(v, digits=3)), " s"]
    eq_seconds = (summary.get("phase_seconds") or {}).get("equilibration")
    if _finite(eq_seconds):
        cost += [", equilibrium analysis ",
                 _cell(summary, "phase_seconds[equilibration]", lambda v: fmt(v, digits=3)), " s"]
    if _finite(summary.get("memory_forecast_bytes")):
        cost += [", memory forecast ", _cell(summary, "memory_forecast_bytes", _bytes)]
    if _finite(summary.get("peak_rss_bytes")):
        cost += [", peak measured ", _cell(summary, "peak_rss_bytes", _bytes)]
    lines.append(HeadlineLine("cost", cost))
    lines.append(HeadlineLine("drifts", [
        "energy ", _cell(summary, "energy_drift", lambda v: fmt(v, digits=2)), ", norm ",
        _cell(summary, "norm_drift", lambda v: fmt(v, digits=2)),
        f" (tolerance {summary.get('tolerance', float('nan')):g} per step)" if _finite(summary.get("tolerance")) else ""]))
    return lines


def _thermal_verdict(o: dict) -> str:
    """'thermal' / 'not thermal' from the late-time value against the canonical one (2 sigma)."""
    can = o.get("canonical")
    ref = o.get("diagonal_ensemble", o.get("equilibrium"))
    if not (_finite(can) and _finite(ref)):
        return ""
    err = o.get("equilibrium_err") if "diagonal_ensemble" not in o else None
    errs = [e for e in (err, o.get("canonical_err")) if _finite(e)]
    tol = 2.0 * math.sqrt(sum(e * e for e in errs)) if errs else 0.0
    # finite-size scale: the temporal fluctuation sigma is the resolution of a single-run answer
    if _finite(o.get("temporal_variance")):
        tol = max(tol, 2.0 * math.sqrt(max(float(o["temporal_variance"]), 0.0)))
    diff = float(ref) - float(can)
    return ("thermal within " + _sig(tol)) if abs(diff) <= tol else ("not thermal: off by " + _sig(diff))


def _bytes(v: Any) -> str:
    if not _finite(v):
        return "n/a"
    v = float(v)
    for unit, size in (("GiB", 2**30), ("MiB", 2**20), ("KiB", 2**10)):
        if v >= size:
            return f"{v / size:.3g} {unit}"
    return f"{int(v)} B"


def hamiltonian_terms(scenario) -> list[str]:
    """The Hamiltonian of a scenario as a few readable terms (S units, sums written out in words)."""
    L = scenario.n_sites
    periodic = scenario.chain.periodic
    out = []
    for c in scenario.couplings:
        j_range = f"j = 0..{L - 1}" if periodic else f"j = 0..{L - 1 - c.range}"
        pair = f"j+{c.range}" + (f" mod {L}" if periodic else "")
        terms = [f"{v:+g} S^{a}_j S^{a}_{{{pair}}}" for a, v in (("x", c.x), ("y", c.y), ("z", c.z)) if v != 0]
        if terms:
            out.append(f"sum over {j_range} of ({' '.join(terms)})")
    for b in scenario.bonds:
        i, j = b.sites
        terms = [f"{v:+g} S^{a}_{i} S^{a}_{j}" for a, v in (("x", b.x), ("y", b.y), ("z", b.z)) if v != 0]
        if terms:
            out.append(" ".join(terms))
    for f in scenario.fields:
        if f.pattern == "uniform":
            out.append(f"{f.strength:+g} sum_j S^{f.axis}_j")
        elif f.pattern == "staggered":
            out.append(f"{f.strength:+g} sum_j (-1)^j S^{f.axis}_j")
        elif f.pattern == "random":
            out.append(f"sum_j h_j S^{f.axis}_j, h_j uniform in [-{f.strength:g}, {f.strength:g}] (seed {f.seed})")
        else:
            out.append(f"sum_j h_j S^{f.axis}_j, h = {list(f.values)}")
    return out or ["0"]


def headline_text(lines: Sequence[HeadlineLine], width: int = 18) -> list[str]:
    """The headline as console lines."""
    return [f"  {ln.label:{width}s} {ln.text()}" for ln in lines]


def basis_text(basis: dict) -> str:
    """The basis a run evolved in, in words: "magnetization basis, dimension 12,870", or for a run in
    symmetry sectors (``kind`` "symmetry-sector") "2 symmetry sector(s) of dimensions 257 + 230 = 487
    (instead of magnetization dimension 12,870)"."""
    if basis.get("kind") != "symmetry-sector":
        return f"{basis.get('kind', '')} basis, dimension {basis.get('dimension', 0):,}"
    dims = basis["sector_dimensions"]
    shown = " + ".join(f"{d:,}" for d in dims[:8]) + (" + ..." if basis["sector_count"] > 8 else "")
    text = f"{basis['sector_count']} symmetry sector(s) of dimensions {shown} = {basis['dimension']:,}"
    plain = basis.get("replaces") or {}
    if plain:
        text += f" (instead of {plain.get('kind', '')} dimension {plain.get('dimension', 0):,})"
    return text

"""PNG plots for run folders.

Every function takes arrays and a target path, writes one PNG and returns the path.
Figures are built with :class:`matplotlib.figure.Figure` and its Agg canvas directly, never
through ``pyplot``, so no global figure state or backend choice leaks out of this module.
Files are written atomically (temp file + rename).
"""

from __future__ import annotations

import functools
import os
import textwrap
from pathlib import Path
from typing import Any, Mapping, Sequence

import matplotlib
import matplotlib.ticker
import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure

from largeq.reports.store import fsync_dir, temp_path_for

__all__ = [
    "TIME_LABEL",
    "plot_relaxation",
    "plot_distance",
    "plot_survival",
    "plot_spectra",
    "plot_thermal",
    "plot_versus_size",
    "plot_panels_versus_size",
]

TIME_LABEL = "time t (1/J)"
ENERGY_LABEL = "energy E (J)"
DPI = 110

_STYLE = {
    "axes.grid": True,
    "grid.alpha": 0.3,
    "axes.spines.top": False,
    "font.size": 9,
    "legend.fontsize": 8,
    "legend.framealpha": 0.8,
}


def _styled(func):
    """Run a plot function inside a temporary rc context (restored afterwards)."""

    @functools.wraps(func)
    def wrapper(*args, **kwargs):
        with matplotlib.rc_context(_STYLE):
            return func(*args, **kwargs)

    return wrapper


def _figure(nrows: int = 1, *, height: float = 3.2, sharex: bool = True, width: float = 8.4):
    fig = Figure(figsize=(width, height * nrows))
    FigureCanvasAgg(fig)
    axes = fig.subplots(nrows, 1, sharex=sharex, squeeze=False)[:, 0]
    return fig, list(axes)


def _save(fig: Figure, path: str | os.PathLike) -> Path:
    path = Path(path)
    tmp = temp_path_for(path)
    try:
        fig.tight_layout()
        fig.savefig(tmp, format="png", dpi=DPI, bbox_inches="tight", pad_inches=0.12)
        os.replace(tmp, path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    finally:
        fig.clear()
    fsync_dir(path.parent)
    return path


def _legend_outside(ax, **kw) -> None:
    """Legend to the right of the axes, never over the data."""
    handles, labels = ax.get_legend_handles_labels()
    if handles:
        ax.legend(handles, labels, loc="upper left", bbox_to_anchor=(1.01, 1.0), borderaxespad=0.0, **kw)


def _wrap(text: str, width: int) -> str:
    """Break a long title at a natural place (before '(' or after ':' / ';'), else by words."""
    if len(text) <= width:
        return text
    cuts = [i for i in range(1, len(text)) if text[i - 1:i + 1] in (" (", ": ", "; ") and i <= width]
    if cuts:
        i = cuts[-1]
        head, tail = text[:i].rstrip(), text[i:].lstrip()
        return head + "\n" + _wrap(tail, width)
    return textwrap.fill(text, width=width, break_on_hyphens=False)


def _title(target, text: str | None, width: int = 72) -> None:
    """A title wrapped onto as many lines as it needs (never cut)."""
    if text:
        wrapped = _wrap(str(text), width)
        if isinstance(target, Figure):
            target.suptitle(wrapped, fontsize=10)
        else:
            target.set_title(wrapped, fontsize=10)


def _integer_ticks(ax, values) -> None:
    """Tick marks at the (integer) chain lengths themselves."""
    v = np.unique(np.asarray(values, float)[np.isfinite(values)])
    if v.size and np.allclose(v, np.round(v)):
        step = max(1, int(np.ceil(v.size / 10)))
        ax.set_xticks(v[::step])
        ax.set_xticklabels([str(int(x)) for x in v[::step]])
        ax.xaxis.set_minor_locator(matplotlib.ticker.NullLocator())


#: line styles that tell curves apart even when they lie on top of each other
LINESTYLES = ["-", (0, (5, 2)), (0, (1, 1.5)), (0, (6, 2, 1, 2)), (0, (3, 1, 1, 1, 1, 1)), (0, (8, 3))]
MARKERS = "osD^vP*X"


def _real(values: Any) -> np.ndarray:
    arr = np.asarray(values)
    return arr.real.astype(float) if np.iscomplexobj(arr) else arr.astype(float)


def _positive(values: Any) -> np.ndarray:
    """Values for a log axis: non-positive entries become NaN (gaps, not errors)."""
    arr = _real(values)
    return np.where(arr > 0, arr, np.nan)


def _colors(n: int) -> list:
    cycle = matplotlib.rcParams["axes.prop_cycle"].by_key().get("color", ["C0"])
    return [cycle[i % len(cycle)] for i in range(n)]


@_styled
def plot_relaxation(
    path: str | os.PathLike,
    times: Sequence[float],
    curves: Mapping[str, Sequence[float]],
    *,
    running_average: Mapping[str, Sequence[float]] | None = None,
    equilibrium: Mapping[str, tuple[float, float]] | None = None,
    window: tuple[float, float] | Mapping[str, tuple[float, float]] | None = None,
    thermal: Mapping[str, Mapping[str, float]] | None = None,
    references: Mapping[str, Mapping[str, float]] | None = None,
    known: Mapping[str, tuple[str, Sequence[float], Sequence[float]]] | None = None,
    equilibrium_label: str = "late-window mean ± σ",
    title: str | None = None,
) -> Path:
    """Relaxation curves ⟨A(t)⟩, one stacked panel per observable, with their reference values.

    Parameters
    ----------
    path : path-like
        Output PNG.
    times : array_like, shape (n_t,)
        Times in 1/J.
    curves : mapping of name to array_like, shape (n_t,)
        ⟨A(t)⟩ for each observable (real part plotted).
    running_average : mapping of name to array_like, optional
        Running time average (1/t)∫⟨A⟩dt, drawn dashed.
    equilibrium : mapping of name to (value, band_halfwidth), optional
        The late-window mean drawn as a line with a shaded band ±halfwidth (σ_A), labelled
        ``equilibrium_label``.
    window : (t0, t1) or mapping of name to (t0, t1), optional
        Late-time window used for averages, shaded light blue.
    references : mapping of name to {label: value}, optional
        Reference values drawn as horizontal lines with one fixed style per label:
        "diagonal ensemble" (solid black), "canonical" (dotted red), "microcanonical"
        (dash-dot purple); other labels get further styles.
    thermal : mapping of name to {label: value}, optional
        Older name for ``references`` (merged into it).
    known : mapping of name to (label, t, value), optional
        A known analytic curve (e.g. a free-fermion result), drawn dashed green.
    title : str, optional
        Figure title (wrapped, never cut).

    Returns
    -------
    pathlib.Path
    """
    t = _real(times)
    names = list(curves)
    if not names:
        raise ValueError("no curves to plot")
    refs: dict[str, dict[str, float]] = {}
    for source in (references or {}, thermal or {}):
        for name, d in source.items():
            refs.setdefault(name, {}).update(d)
    fig, axes = _figure(len(names), height=2.5)
    ref_styles = {"diagonal ensemble": ("k", "-", 1.3), "canonical": ("tab:red", (0, (1, 1.2)), 1.6),
                  "microcanonical": ("tab:purple", (0, (6, 2, 1, 2)), 1.3)}
    extra_styles = [("tab:brown", (0, (3, 1, 1, 1, 1, 1)), 1.2), ("tab:olive", (0, (8, 3)), 1.2)]
    for ax, name in zip(axes, names):
        color = "tab:blue"  # one panel per observable: the curve is always blue, the references keep their styles
        win = window.get(name) if isinstance(window, Mapping) else window
        if win is not None and all(np.isfinite(win)):
            ax.axvspan(float(win[0]), float(win[1]), color="#cfe3f7", alpha=0.45, lw=0, label="averaging window")
        if equilibrium and name in equilibrium:
            value, half = equilibrium[name]
            if value is not None and np.isfinite(value):
                if half is not None and np.isfinite(half) and half > 0:
                    ax.axhspan(float(value) - half, float(value) + half, color="tab:orange", alpha=0.22, lw=0)
                ax.axhline(float(value), color="tab:orange", lw=1.1, label=equilibrium_label)
        ax.plot(t, _real(curves[name]), color=color, lw=1.2, label="⟨A(t)⟩")
        if running_average and name in running_average:
            ax.plot(t, _real(running_average[name]), color=color, ls="--", lw=1.0,
                    alpha=0.8, label="running average")
        if known and name in known:
            label, tk, yk = known[name]
            ax.plot(_real(tk), _real(yk), color="tab:green", ls=(0, (4, 2)), lw=1.3, label=label)
        k = 0
        for label, value in refs.get(name, {}).items():
            if value is None or not np.isfinite(value):
                continue
            if label in ref_styles:
                c, ls, lw = ref_styles[label]
            else:
                c, ls, lw = extra_styles[k % len(extra_styles)]
                k += 1
            ax.axhline(float(value), color=c, lw=lw, ls=ls, label=label)
        ax.set_ylabel(name)
    # the styles are the same in every panel: one legend, beside the first panel, lists them all
    handles, labels = {}, []
    for ax in axes:
        for h, lab in zip(*ax.get_legend_handles_labels()):
            if lab not in handles:
                handles[lab] = h
                labels.append(lab)
    axes[0].legend([handles[lab] for lab in labels], labels, loc="upper left", bbox_to_anchor=(1.01, 1.0),
                   borderaxespad=0.0)
    axes[-1].set_xlabel(TIME_LABEL)
    _title(axes[0], title)
    return _save(fig, path)


def _same_curves(arrays: Mapping[str, np.ndarray]) -> list[list[str]]:
    """Names grouped by identical curves (to draw each once, labelled with all its names)."""
    groups: list[list[str]] = []
    for name, arr in arrays.items():
        for g in groups:
            ref = arrays[g[0]]
            if ref.shape == arr.shape and np.allclose(ref, arr, rtol=1e-9, atol=1e-14, equal_nan=True):
                g.append(name)
                break
        else:
            groups.append([name])
    return groups


@_styled
def plot_distance(
    path: str | os.PathLike,
    times: Sequence[float],
    distances: Mapping[str, Sequence[float]],
    *,
    fluctuation_level: Mapping[str, float] | None = None,
    bound_level: Mapping[str, float] | None = None,
    title: str | None = None,
) -> Path:
    """Distance to equilibrium d(t) = (⟨A(t)⟩ − ⟨A⟩∞)² on a log axis.

    Identical curves (e.g. a site magnetization and the staggered one on a ring) are drawn
    once and labelled with every name; each observable keeps its colour and line style, and
    its σ_A² level is drawn in the same colour, dashed.

    Parameters
    ----------
    path : path-like
        Output PNG.
    times : array_like
        Times in 1/J.
    distances : mapping of name to array_like
        d(t) per observable; non-positive values are left as gaps.
    fluctuation_level : mapping of name to float, optional
        Temporal fluctuation σ_A² per observable, drawn as a dashed horizontal line.
    bound_level : mapping of name to float, optional
        Upper bound on σ_A² per observable (e.g. from d_eff), drawn dotted in the same colour.
    title : str, optional

    Returns
    -------
    pathlib.Path
    """
    t = _real(times)
    fig, (ax,) = _figure(1, height=3.6)
    arrays = {n: _real(d) for n, d in distances.items()}
    groups = _same_curves(arrays)
    for i, (group, color) in enumerate(zip(groups, _colors(len(groups)))):
        label = " = ".join(group)
        ax.plot(t, _positive(arrays[group[0]]), color=color, lw=1.1, ls=LINESTYLES[i % len(LINESTYLES)],
                label=f"d(t) {label}")
        if fluctuation_level and group[0] in fluctuation_level:
            level = fluctuation_level[group[0]]
            if level is not None and np.isfinite(level) and level > 0:
                ax.axhline(float(level), color=color, ls=(0, (2, 2)), lw=1.0, alpha=0.9, label=f"σ² {label}")
        if bound_level and group[0] in bound_level:
            level = bound_level[group[0]]
            if level is not None and np.isfinite(level) and level > 0:
                ax.axhline(float(level), color=color, ls=(0, (0.8, 2.5)), lw=1.6, label=f"bound on σ² {label}")
    ax.set_yscale("log")
    ax.set_xlabel(TIME_LABEL)
    ax.set_ylabel("d(t) = (⟨A(t)⟩ − late-window mean)²")
    _legend_outside(ax)
    _title(ax, title)
    return _save(fig, path)


@_styled
def plot_survival(
    path: str | os.PathLike,
    times: Sequence[float],
    survival: Sequence[float],
    *,
    plateau: float | None = None,
    inverse_deff: float | None = None,
    title: str | None = None,
) -> Path:
    """Survival probability |⟨ψ|e^{−iHt}|ψ⟩|² on a log axis.

    Parameters
    ----------
    path : path-like
        Output PNG.
    times : array_like
        Times in 1/J.
    survival : array_like
        Survival probability.
    plateau : float, optional
        Long-time average of the curve (dashed line).
    inverse_deff : float, optional
        1/d_eff = Σ|c_m|⁴ from another estimate (dotted line), for comparison.
    title : str, optional

    Returns
    -------
    pathlib.Path
    """
    t = _real(times)
    fig, (ax,) = _figure(1, height=3.4)
    ax.plot(t, _positive(survival), color="C0", lw=1.0, label="|⟨ψ|ψ(t)⟩|²")
    if plateau is not None and np.isfinite(plateau) and plateau > 0:
        ax.axhline(float(plateau), color="C1", ls="--", lw=1.0, label="late-time mean")
    if inverse_deff is not None and np.isfinite(inverse_deff) and inverse_deff > 0:
        ax.axhline(float(inverse_deff), color="k", ls=":", lw=1.5, label=f"1/d_eff = {inverse_deff:.3g}")
    ax.set_yscale("log")
    ax.set_xlabel(TIME_LABEL)
    ax.set_ylabel("survival probability")
    _legend_outside(ax)
    _title(ax, title)
    return _save(fig, path)


@_styled
def plot_spectra(
    path: str | os.PathLike,
    energies: Sequence[float],
    ldos: Sequence[float],
    dos: Sequence[float],
    *,
    dos_err: Sequence[float] | None = None,
    state_energy: float | None = None,
    state_width: float | None = None,
    title: str | None = None,
) -> Path:
    """Energy-weight distribution (LDOS) drawn over the density of states.

    The LDOS uses the left axis, the DOS the right axis.

    Parameters
    ----------
    path : path-like
        Output PNG.
    energies : array_like
        Energy grid in J.
    ldos : array_like
        ρ_ψ(E) = Σ|c_m|² δ(E − E_m), broadened.
    dos : array_like
        ρ(E) = Σ δ(E − E_m), broadened.
    dos_err : array_like, optional
        Statistical error of the DOS (shaded band).
    state_energy : float, optional
        ⟨ψ|H|ψ⟩ (vertical line).
    state_width : float, optional
        Energy standard deviation of the state (shaded ± around ``state_energy``).
    title : str, optional

    Returns
    -------
    pathlib.Path
    """
    e = _real(energies)
    fig, (ax,) = _figure(1, height=3.4)
    ax2 = ax.twinx()
    ax2.grid(False)
    d = _real(dos)
    ax2.plot(e, d, color="tab:gray", lw=1.0, label="ρ(E) (DOS)")
    if dos_err is not None:
        err = _real(dos_err)
        ax2.fill_between(e, d - err, d + err, color="tab:gray", alpha=0.25, lw=0)
    ax.plot(e, _real(ldos), color="C0", lw=1.3, label="ρ_ψ(E) (LDOS)")
    if state_energy is not None and np.isfinite(state_energy):
        ax.axvline(float(state_energy), color="C3", lw=1.0, label="⟨ψ|H|ψ⟩")
        if state_width is not None and np.isfinite(state_width) and state_width > 0:
            ax.axvspan(float(state_energy) - state_width, float(state_energy) + state_width,
                       color="C3", alpha=0.1, lw=0, label="± ΔE")
    ax.set_xlabel(ENERGY_LABEL)
    ax.set_ylabel("ρ_ψ(E) (1/J)", color="C0")
    ax2.set_ylabel("ρ(E) (states/J)", color="tab:gray")
    ax.set_zorder(ax2.get_zorder() + 1)
    ax.patch.set_visible(False)
    h1, l1 = ax.get_legend_handles_labels()
    h2, l2 = ax2.get_legend_handles_labels()
    ax2.set_zorder(0)
    ax.legend(h1 + h2, l1 + l2, loc="upper left", bbox_to_anchor=(1.12, 1.0), borderaxespad=0.0)
    _title(ax, title)
    return _save(fig, path)


@_styled
def plot_thermal(
    path: str | os.PathLike,
    temperatures_or_betas: Sequence[float],
    values: Mapping[str, tuple[Sequence[float], Sequence[float] | None]],
    *,
    target: float | Mapping[str, float] | None = None,
    xlabel: str = "temperature T (J)",
    ylabel: str = "thermal value",
    logx: bool = False,
    title: str | None = None,
) -> Path:
    """Thermal values against temperature (or inverse temperature) with error bands.

    Parameters
    ----------
    path : path-like
        Output PNG.
    temperatures_or_betas : array_like
        x values (label them with ``xlabel``, e.g. ``"inverse temperature β (1/J)"``).
    values : mapping of name to (mean, err)
        Curves with their statistical errors (``err`` may be None).
    target : float or mapping of name to float, optional
        A float marks the x value that matches the state (vertical line, e.g. the β with
        ⟨H⟩_β = ⟨ψ|H|ψ⟩); a mapping draws reference values (e.g. ⟨A⟩∞) as horizontal lines.
    xlabel, ylabel : str
        Axis labels.
    logx : bool
        Logarithmic x axis.
    title : str, optional

    Returns
    -------
    pathlib.Path
    """
    x = _real(temperatures_or_betas)
    fig, (ax,) = _figure(1, height=3.4)
    for name, color in zip(values, _colors(len(values))):
        mean, err = values[name]
        m = _real(mean)
        ax.plot(x, m, color=color, lw=1.2, label=name)
        if err is not None:
            e = _real(err)
            ax.fill_between(x, m - e, m + e, color=color, alpha=0.2, lw=0)
    if isinstance(target, Mapping):
        for (name, value), color in zip(target.items(), _colors(len(values))):
            if value is not None and np.isfinite(value):
                ax.axhline(float(value), color=color, ls="--", lw=1.0, label=f"{name} target")
    elif target is not None and np.isfinite(target):
        ax.axvline(float(target), color="k", ls="--", lw=1.0, label="matched to ⟨ψ|H|ψ⟩")
    if logx:
        ax.set_xscale("log")
    ax.set_xlabel(xlabel)
    ax.set_ylabel(ylabel)
    _legend_outside(ax)
    _title(ax, title)
    return _save(fig, path)


def _log_labels(ax) -> None:
    """Plain-number tick labels on a log y axis; minor ticks labelled only when it spans < 1.5 decades."""
    lo, hi = ax.get_ylim()
    plain = matplotlib.ticker.FuncFormatter(lambda v, _: f"{v:g}")
    ax.yaxis.set_major_formatter(plain)
    if lo > 0 and np.log10(hi / lo) < 1.5:
        def minor(v, _):
            mant = v / 10 ** np.floor(np.log10(v)) if v > 0 else 0
            return f"{v:g}" if round(mant) in (2, 5) else ""
        ax.yaxis.set_minor_formatter(matplotlib.ticker.FuncFormatter(minor))
    else:
        ax.yaxis.set_minor_formatter(matplotlib.ticker.NullFormatter())


def _draw_versus_size(ax, L, series, *, logy=False, fit=None, bands=None, ylabel="value",
                      xlabel="chain length L") -> None:
    arrays = {label: _real(series[label][0]) for label in series}
    groups = _same_curves(arrays)  # identical series drawn once, labelled with every name
    colors = {}
    for i, (group, color) in enumerate(zip(groups, _colors(len(groups)))):
        vals, errs = series[group[0]]
        yerr = None if errs is None else np.abs(_real(errs))
        if yerr is not None and not np.any(np.isfinite(yerr)):
            yerr = None
        ax.errorbar(L, arrays[group[0]], yerr=yerr, color=color, marker=MARKERS[i % len(MARKERS)], ms=5,
                    lw=0.9, ls=LINESTYLES[i % len(LINESTYLES)], capsize=3, label=" = ".join(group))
        for label in group:
            colors[label] = color
    fits = dict(fit or {})
    fit_groups = _same_curves({k: _real(v[1]) for k, v in fits.items()}) if fits else []
    fit_colors = _colors(len(groups) + len(fit_groups))
    for j, group in enumerate(fit_groups):
        label = group[0]
        xf, yf = fits[label]
        # a fit takes the colour of the series whose name it contains, else its own
        color = next((c for name, c in sorted(colors.items(), key=lambda kv: -len(kv[0])) if name in label),
                     fit_colors[len(groups) + j])
        ax.plot(_real(xf), _real(yf), ls=LINESTYLES[(j + 1) % len(LINESTYLES)], lw=1.2, color=color,
                alpha=0.9, label=" = ".join(group))
        if bands and label in bands:
            xb, lo, hi = bands[label]
            ax.fill_between(_real(xb), _real(lo), _real(hi), color=color, alpha=0.15, lw=0)
    if logy:
        ax.set_yscale("log")
        _log_labels(ax)
    ax.set_xlabel(xlabel)
    ax.set_ylabel(ylabel)
    if xlabel.startswith("chain length"):
        _integer_ticks(ax, L)
    _legend_outside(ax)


@_styled
def plot_versus_size(
    path: str | os.PathLike,
    sizes: Sequence[float],
    series: Mapping[str, tuple[Sequence[float], Sequence[float] | None]],
    *,
    logy: bool = False,
    fit: Mapping[str, tuple[Sequence[float], Sequence[float]]] | None = None,
    bands: Mapping[str, tuple[Sequence[float], Sequence[float], Sequence[float]]] | None = None,
    xlabel: str = "chain length L",
    ylabel: str = "value",
    title: str | None = None,
) -> Path:
    """One quantity against chain length (finite-size trends, estimate vs exact).

    Parameters
    ----------
    path : path-like
        Output PNG.
    sizes : array_like
        Chain lengths L, shared by all series (use NaN for a missing value); integer sizes get
        one tick each.
    series : mapping of label to (values, errs)
        Markers with error bars (``errs`` may be None); each series its own colour, marker and
        line style.
    logy : bool
        Logarithmic y axis (e.g. for d_eff or σ_A).
    fit : mapping of label to (x, y), optional
        Fitted or extrapolated curves; a fit whose label contains a series' label takes that
        series' colour.
    bands : mapping of fit label to (x, low, high), optional
        Uncertainty band of a fit (shaded).
    xlabel, ylabel : str
        Axis labels.
    title : str, optional

    Returns
    -------
    pathlib.Path
    """
    L = _real(sizes)
    fig, (ax,) = _figure(1, height=3.6)
    _draw_versus_size(ax, L, series, logy=logy, fit=fit, bands=bands, ylabel=ylabel, xlabel=xlabel)
    _title(ax, title)
    return _save(fig, path)


@_styled
def plot_panels_versus_size(
    path: str | os.PathLike,
    sizes: Sequence[float],
    panels: Sequence[Mapping[str, Any]],
    *,
    xlabel: str = "chain length L",
    title: str | None = None,
) -> Path:
    """Several quantities against chain length, one quantity (one unit) per stacked panel.

    Parameters
    ----------
    path : path-like
        Output PNG.
    sizes : array_like
        Chain lengths L shared by all panels.
    panels : sequence of mappings
        Each with ``series`` (as in :func:`plot_versus_size`) and optionally ``ylabel``,
        ``logy``, ``fit`` and ``bands``.
    xlabel : str
    title : str, optional

    Returns
    -------
    pathlib.Path
    """
    if not panels:
        raise ValueError("no panels to plot")
    L = _real(sizes)
    fig, axes = _figure(len(panels), height=2.6)
    for ax, panel in zip(axes, panels):
        _draw_versus_size(ax, L, panel["series"], logy=panel.get("logy", False), fit=panel.get("fit"),
                          bands=panel.get("bands"), ylabel=panel.get("ylabel", "value"), xlabel=xlabel)
    for ax in axes[:-1]:
        ax.set_xlabel("")
    _title(axes[0], title)
    return _save(fig, path)

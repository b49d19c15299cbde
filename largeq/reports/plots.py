"""PNG plots for run folders.

Every function takes arrays and a target path, writes one PNG and returns the path.
Figures are built with :class:`matplotlib.figure.Figure` and its Agg canvas directly, never
through ``pyplot``, so no global figure state or backend choice leaks out of this module.
Files are written atomically (temp file + rename).
"""

from __future__ import annotations

import functools
import os
from pathlib import Path
from typing import Any, Mapping, Sequence

import matplotlib
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


def _figure(nrows: int = 1, *, height: float = 3.2, sharex: bool = True):
    fig = Figure(figsize=(6.4, height * nrows))
    FigureCanvasAgg(fig)
    axes = fig.subplots(nrows, 1, sharex=sharex, squeeze=False)[:, 0]
    return fig, list(axes)


def _save(fig: Figure, path: str | os.PathLike) -> Path:
    path = Path(path)
    tmp = temp_path_for(path)
    try:
        fig.tight_layout()
        fig.savefig(tmp, format="png", dpi=DPI)
        os.replace(tmp, path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    finally:
        fig.clear()
    fsync_dir(path.parent)
    return path


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
    window: tuple[float, float] | None = None,
    thermal: Mapping[str, Mapping[str, float]] | None = None,
    title: str | None = None,
) -> Path:
    """Relaxation curves ⟨A(t)⟩, one stacked panel per observable.

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
        Equilibrium value ⟨A⟩_∞ drawn as a line with a shaded band ±halfwidth (e.g. σ_A).
    window : (t0, t1), optional
        Late-time window used for averages, shaded grey.
    thermal : mapping of name to {label: value}, optional
        Thermal reference values (e.g. ``{"canonical": 0.1}``), drawn as dotted lines.
    title : str, optional
        Figure title.

    Returns
    -------
    pathlib.Path
    """
    t = _real(times)
    names = list(curves)
    if not names:
        raise ValueError("no curves to plot")
    fig, axes = _figure(len(names), height=2.4)
    thermal_styles = [":", (0, (5, 2, 1, 2)), (0, (1, 3)), (0, (3, 1, 1, 1, 1, 1))]
    for ax, name, color in zip(axes, names, _colors(len(names))):
        ax.plot(t, _real(curves[name]), color=color, lw=1.2, label=name)
        if running_average and name in running_average:
            ax.plot(t, _real(running_average[name]), color=color, ls="--", lw=1.0,
                    alpha=0.8, label="running average")
        if equilibrium and name in equilibrium:
            value, half = equilibrium[name]
            ax.axhline(float(value), color="k", lw=0.9, label="⟨A⟩∞ (equilibrium)")
            if half is not None and np.isfinite(half) and half > 0:
                ax.axhspan(float(value) - half, float(value) + half, color="k", alpha=0.12,
                           lw=0, label="± band")
        if window is not None:
            ax.axvspan(float(window[0]), float(window[1]), color="tab:gray", alpha=0.12, lw=0,
                       label="late window")
        if thermal and name in thermal:
            for i, (label, value) in enumerate(thermal[name].items()):
                if value is None or not np.isfinite(value):
                    continue
                ax.axhline(float(value), color="tab:red", lw=1.0,
                           ls=thermal_styles[i % len(thermal_styles)], label=label)
        ax.set_ylabel("⟨A(t)⟩")
        ax.legend(loc="best", title=None, ncols=2)
    axes[-1].set_xlabel(TIME_LABEL)
    if title:
        axes[0].set_title(title)
    return _save(fig, path)


@_styled
def plot_distance(
    path: str | os.PathLike,
    times: Sequence[float],
    distances: Mapping[str, Sequence[float]],
    *,
    fluctuation_level: Mapping[str, float] | None = None,
    title: str | None = None,
) -> Path:
    """Distance to equilibrium d(t) = (⟨A(t)⟩ − ⟨A⟩∞)² on a log axis.

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
    title : str, optional

    Returns
    -------
    pathlib.Path
    """
    t = _real(times)
    fig, (ax,) = _figure(1, height=3.4)
    for name, color in zip(distances, _colors(len(distances))):
        ax.plot(t, _positive(distances[name]), color=color, lw=1.0, label=f"d(t) {name}")
        if fluctuation_level and name in fluctuation_level:
            level = fluctuation_level[name]
            if level is not None and np.isfinite(level) and level > 0:
                ax.axhline(float(level), color=color, ls="--", lw=1.0, label=f"σ_A² {name}")
    ax.set_yscale("log")
    ax.set_xlabel(TIME_LABEL)
    ax.set_ylabel("d(t)")
    ax.legend(loc="best")
    if title:
        ax.set_title(title)
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
        ax.axhline(float(plateau), color="C1", ls="--", lw=1.0, label="plateau")
    if inverse_deff is not None and np.isfinite(inverse_deff) and inverse_deff > 0:
        ax.axhline(float(inverse_deff), color="C2", ls=":", lw=1.3, label="1/d_eff")
    ax.set_yscale("log")
    ax.set_xlabel(TIME_LABEL)
    ax.set_ylabel("survival probability")
    ax.legend(loc="best")
    if title:
        ax.set_title(title)
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
    ax.legend(h1 + h2, l1 + l2, loc="upper right")
    if title:
        ax.set_title(title)
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
    ax.legend(loc="best")
    if title:
        ax.set_title(title)
    return _save(fig, path)


@_styled
def plot_versus_size(
    path: str | os.PathLike,
    sizes: Sequence[float],
    series: Mapping[str, tuple[Sequence[float], Sequence[float] | None]],
    *,
    logy: bool = False,
    fit: Mapping[str, tuple[Sequence[float], Sequence[float]]] | None = None,
    xlabel: str = "chain length L",
    ylabel: str = "value",
    title: str | None = None,
) -> Path:
    """Quantities against chain length (finite-size trends, estimate vs exact).

    Parameters
    ----------
    path : path-like
        Output PNG.
    sizes : array_like
        Chain lengths L, shared by all series (use NaN for a missing value).
    series : mapping of label to (values, errs)
        Markers with error bars (``errs`` may be None).
    logy : bool
        Logarithmic y axis (e.g. for d_eff or σ_A).
    fit : mapping of label to (x, y), optional
        Fitted or extrapolated curves drawn as dashed lines.
    xlabel, ylabel : str
        Axis labels.
    title : str, optional

    Returns
    -------
    pathlib.Path
    """
    L = _real(sizes)
    fig, (ax,) = _figure(1, height=3.4)
    markers = "osD^vP*X"
    for i, (label, color) in enumerate(zip(series, _colors(len(series)))):
        vals, errs = series[label]
        y = _real(vals)
        yerr = None if errs is None else np.abs(_real(errs))
        ax.errorbar(L, y, yerr=yerr, color=color, marker=markers[i % len(markers)], ms=5,
                    lw=0.8, capsize=3, label=label)
    if fit:
        for label, (xf, yf) in fit.items():
            ax.plot(_real(xf), _real(yf), ls="--", lw=1.0, color="k", alpha=0.7, label=label)
    if logy:
        ax.set_yscale("log")
    ax.set_xlabel(xlabel)
    ax.set_ylabel(ylabel)
    ax.legend(loc="best")
    if title:
        ax.set_title(title)
    return _save(fig, path)

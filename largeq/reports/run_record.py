"""The metadata every run folder's ``results.h5`` carries, built in one place for every command."""

from __future__ import annotations

from typing import Any

from largeq import __version__
from largeq.operators.problem import spin_conventions
from largeq.reports.store import package_versions, run_metadata

__all__ = ["run_attributes", "summary_head"]


def run_attributes(command: str, scenario_text: str, title: str, *, problem=None, **extra: Any) -> dict:
    """Attributes of a run's ``results.h5``.

    Always: ``command``, ``largeq_version``, ``scenario_toml``, ``title``, ``conventions`` (units and bit
    order), ``versions`` (libraries) and ``machine`` (host, cores, memory, time).  With ``problem`` (a
    :class:`~largeq.operators.problem.Problem`) also its ``basis``, ``basis_reason``, ``symmetries`` and
    ``initial_state``.  ``extra`` keys are added last (and may override ``basis_reason``).
    """
    attrs: dict[str, Any] = {
        "command": command,
        "largeq_version": __version__,
        "scenario_toml": scenario_text,
        "title": title,
        "conventions": spin_conventions(),
        "versions": package_versions(),
        "machine": run_metadata(),
    }
    if problem is not None:
        attrs.update(basis=problem.basis.describe(), basis_reason=problem.basis_reason,
                     symmetries=problem.symmetries, initial_state=problem.start.label)
    attrs.update(extra)
    return attrs


def summary_head(command: str, problem, dimension: int, ensemble_note: str) -> dict:
    """The first keys of a spectra or thermal summary.json: what ran, on which chain, basis and state."""
    return {
        "command": command,
        "title": problem.scenario.title,
        "sites": problem.n_sites,
        "basis": problem.basis.describe() | {"reason": problem.basis_reason},
        "dimension": dimension,
        "ensemble_note": ensemble_note,
        "initial_state": problem.start.label,
    }

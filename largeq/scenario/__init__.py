"""Scenario layer: the schema of a quench (frozen dataclasses), TOML loading and saving, model presets
and the built-in examples.  The lowest layer of the package after :mod:`largeq.constants`."""

from largeq.scenario.spec import (Scenario, ScenarioError, load_scenario, parse_scenario, scenario_to_dict,
                                  scenario_to_toml)
from largeq.scenario.examples import builtin_examples, resolve_scenario

__all__ = ["Scenario", "ScenarioError", "load_scenario", "parse_scenario", "scenario_to_dict", "scenario_to_toml",
           "builtin_examples", "resolve_scenario"]

"""Errors the workflows raise for requests they cannot carry out (the command line prints them in one line)."""

from __future__ import annotations

__all__ = ["WorkflowError", "OptionError"]


class WorkflowError(ValueError):
    """A request a workflow cannot carry out as asked (the message says why and what would work)."""


class OptionError(WorkflowError):
    """A workflow option outside its allowed values (the message names the option and the allowed values)."""

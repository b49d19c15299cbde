"""Engines: plain functions over the LinearOperator protocol (no files, no scenarios)."""

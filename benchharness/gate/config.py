"""Validation entry point for the ``gate:`` section (called by `benchharness.experiment.sections`).

`gate_settings(exp)` returns the parsed `GateConfig` (build factor, baseline and
candidate levels, `GateSettings`) or raises `ExperimentError` located at
``FILE:LINE:COL``; `plan` and `run` call it so a malformed section is reported
before the first run. The parsing itself lives in `benchharness.gate.session`.
"""

from __future__ import annotations


def gate_settings(exp, overrides=None):
    """Parse and validate ``exp.sections['gate']``; returns a `GateConfig`."""
    from benchharness.gate.session import parse_gate_section

    return parse_gate_section(exp, overrides)

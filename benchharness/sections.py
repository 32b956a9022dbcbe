"""Validating every capability section of an experiment file before anything runs.

Each capability owns and validates its own section (`Experiment.sections`);
this module only calls them all, so that `plan` and `run` report a malformed
``choose:`` or ``metrics:`` section at ``FILE:LINE:COL`` before the first run
rather than after the last.
"""

from __future__ import annotations


def validate_sections(exp) -> None:
    """Raise `ExperimentError` for the first malformed capability section."""
    from benchharness.execute.controls import parse_controls
    from benchharness.quality import quality_config

    parse_controls(exp)
    quality_config(exp)  # expect / metrics / samples / perf
    if "choose" in exp.sections:
        from benchharness.choose.config import choose_settings

        choose_settings(exp)
    if "gate" in exp.sections:
        try:
            from benchharness.gate.config import gate_settings
        except ImportError:  # pragma: no cover - gate capability not present
            return
        gate_settings(exp)

"""Validating every capability section of an experiment file before anything runs.

Each capability owns and validates its own section (`Experiment.sections`);
this module calls them all, so that `plan` and `run` report a malformed
``choose:`` or ``metrics:`` section at ``FILE:LINE:COL`` before the first run
rather than after the last. It also checks, before any run, what used to be
found only by running: ``compare:`` naming a factor or level the experiment
does not have (found after the whole experiment, by `analyze`), and noise
controls (``pin:``, ``nice:``) that no cell could apply.
"""

from __future__ import annotations

#: Most distinct cells whose ``pin``/``nice`` are rendered here; beyond that the
#: planned-run limit or the start of `run` (which renders every cell) decides.
_CONTROL_CELLS = 100_000


def validate_sections(exp) -> None:
    """Raise `ExperimentError` for the first malformed capability section."""
    from benchharness.execute.controls import parse_controls
    from benchharness.measure.quality import quality_config

    from benchharness.design import check_plan_size
    from benchharness.measure.host import host_check_mode

    check_plan_size(exp)  # before anything is built: the planned-run limit
    host_check_mode(exp)
    controls = parse_controls(exp)
    _check_controls(exp, controls)
    quality_config(exp)  # expect / metrics / samples / perf
    _check_compare(exp)
    if "response" in exp.sections:
        from benchharness.experiment.response import declared_response

        declared_response(exp)
    if "roles" in exp.sections:
        from benchharness.experiment.roles import declared_roles

        declared_roles(exp)
    if "numeric" in exp.sections:
        from benchharness.experiment.quantities import declared_numeric

        declared_numeric(exp)
    if "choose" in exp.sections:
        from benchharness.choose.config import choose_settings

        choose_settings(exp)
    if "gate" in exp.sections:
        try:
            from benchharness.gate.config import gate_settings
        except ImportError:  # pragma: no cover - gate capability not present
            return
        gate_settings(exp)


def _check_compare(exp) -> None:
    """``compare:`` items must name factors and levels of this experiment."""
    import yaml

    from benchharness.errors import UsageError
    from benchharness.experiment.yamlnodes import is_null, node_error, to_plain

    node = exp.sections.get("compare")
    if node is None or is_null(node):
        return
    from benchharness.analysis.comparisons import parse_declared

    names = list(exp.factor_names)
    levels = [list(f.labels) for f in exp.factors]
    try:
        parse_declared(to_plain(node), names, levels)
    except UsageError as exc:
        k = getattr(exc, "item", None)
        target = node
        if k and isinstance(node, yaml.SequenceNode) and 0 < k <= len(node.value):
            target = node.value[k - 1]
        raise node_error(target, f"'compare': {exc}; compare two levels the experiment lists",
                         exp.path) from None


def _check_controls(exp, controls) -> None:
    """Render ``pin``/``nice`` for every combination of the factors they name and
    check each (CPUs this machine has, a niceness from -20 to 19)."""
    import itertools

    from benchharness.experiment import templating
    from benchharness.execute.controls import resolve_cell

    if not (controls.pin or controls.nice):
        return
    used: set[str] = set()
    for text in (controls.pin, controls.nice):
        if text:
            try:
                used |= {ph.factor for ph in templating.placeholders(text)}
            except ValueError:
                return  # malformed braces: reported with their position by the file's check
    vary = [f for f in exp.factors if f.name in used]
    n = 1
    for f in vary:
        n *= len(f.levels)
    if n > _CONTROL_CELLS:
        return
    base = {f.name: f.labels[0] for f in exp.factors}
    names = [f.name for f in vary]
    for combo in itertools.product(*(f.labels for f in vary)):
        levels = dict(base)
        levels.update(zip(names, combo))
        resolve_cell(exp, controls, levels)

"""Factor roles: which factors are choices, which are inputs, which are machines.

A factor plays one of three roles:

* a **setting** -- something we choose and ship (a flag, a codec, a pool size);
* a **workload** -- what the program is given (input kind, input size, corpus);
* an **environment** -- where it runs (machine, disk, runtime version).

Decisions (``choose``) pick settings only, and pick them so that they hold up
across workloads and environments: recommending "n=400" as a default is
meaningless when ``n`` is the input size.

The experiment file declares roles in one top-level section, mapping each role
to the factors that play it; factors it does not name are settings::

    roles:
      workload: [corpus, size]
      environment: [disk]

(``setting: [...]`` may be listed too; a role may name a single factor as a
plain value.) Unknown roles, unknown factors and a factor named twice are
errors at ``FILE:LINE:COL``.

When no roles are declared and the experiment's ``design:`` is a response surface, every
factor is a setting (the surface proposes values for all of them, whatever their names).
Otherwise `guess_roles` treats a factor as a workload when
its name or its levels read like an input (the name ``n``, ``size``,
``input``, ``corpus``, ``dataset``, ``file`` ...; levels that are file paths
or carry an input value such as ``{n: 200000}``) and says why for each, so a
command can show its reasoning and suggest the declaration. This module is
stdlib-only: ``plan`` shows the roles without importing anything heavy.
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field
from typing import Iterable, Mapping

from benchharness.errors import ExperimentError

__all__ = ["ROLES", "Roles", "declared_roles", "guess_roles", "factor_roles",
           "declaration_text", "is_response_surface", "surface_guess"]

ROLES = ("setting", "workload", "environment")

#: Whole factor names that read as an input (lower case, common practice).
_INPUT_NAMES = frozenset({
    "n", "size", "len", "length", "input", "inputs", "corpus", "corpora", "dataset",
    "datasets", "data", "file", "files", "workload", "workloads", "payload", "payloads",
    "document", "documents", "records", "rows", "items", "problem", "graph", "matrix",
    "image", "images", "query", "queries", "trace", "traces", "scenario", "request",
    "requests", "message", "messages",
})
#: Words that mark an input anywhere in a factor name (``input_size``, ``data_kind``).
_INPUT_WORDS = frozenset({
    "input", "inputs", "corpus", "dataset", "data", "file", "files", "workload", "payload",
    "trace", "problem", "document", "documents", "records", "rows", "items", "elements",
})
#: Named values of a level that carry an input (``size: {small: {n: 200000}}``).
_INPUT_VALUE_KEYS = frozenset({
    "n", "size", "input", "file", "path", "corpus", "dataset", "data", "rows", "records",
    "items", "bytes", "length", "count",
})
#: Why every factor of a response surface is a setting when no roles are declared.
SURFACE_REASON = "a setting of the response surface, which proposes values for all of them"
_FILE_NAME = re.compile(r"[^./\\][^/\\]*\.[A-Za-z][A-Za-z0-9]{0,4}")


@dataclass(frozen=True)
class Roles:
    """The role of every factor, and where it came from.

    ``source``: ``"experiment file"``, ``"command line"`` or ``"guessed"``;
    ``reasons`` says, for a guessed role, why the factor got it.
    """

    setting: tuple[str, ...]
    workload: tuple[str, ...] = ()
    environment: tuple[str, ...] = ()
    source: str = "guessed"
    reasons: Mapping[str, str] = field(default_factory=dict)

    @property
    def declared(self) -> bool:
        return self.source != "guessed"

    @property
    def conditions(self) -> tuple[str, ...]:
        """Workloads then environments: what a default must hold up across."""
        return self.workload + self.environment

    def role_of(self, factor: str) -> str | None:
        for role in ROLES:
            if factor in getattr(self, role):
                return role
        return None

    def to_dict(self) -> dict:
        return {"setting": list(self.setting), "workload": list(self.workload),
                "environment": list(self.environment), "declared": self.declared,
                "source": self.source, "reasons": dict(self.reasons)}


def _factor_labels(experiment) -> dict[str, list]:
    """factor -> list of (label, named values) from an experiment."""
    out = {}
    for f in getattr(experiment, "factors", ()) or ():
        out[f.name] = [(lv.label, dict(lv.values)) for lv in f.levels]
    return out


def declared_roles(experiment) -> Roles | None:
    """The validated ``roles:`` section of an experiment, or None when it has none.

    Raises `ExperimentError` at ``FILE:LINE:COL`` for an unknown role, an
    unknown factor, or a factor given two roles.
    """
    if experiment is None:
        return None
    node = (getattr(experiment, "sections", None) or {}).get("roles")
    if node is None:
        return None
    path = str(getattr(experiment, "path", "") or "") or None
    names = tuple(experiment.factor_names)
    try:
        given = _roles_section(node, names)
    except ExperimentError as exc:
        if exc.path in (None, "<string>") and path:
            raise ExperimentError(exc.bare, path=path, line=exc.line, col=exc.col) from None
        raise
    taken = set(given["workload"]) | set(given["environment"])
    setting = tuple(f for f in names if f not in taken)
    return Roles(setting=setting, workload=tuple(f for f in names if f in given["workload"]),
                 environment=tuple(f for f in names if f in given["environment"]),
                 source="experiment file")


def _roles_section(node, names) -> dict[str, list[str]]:
    """Role -> the factors the ``roles:`` node gives it (every role a key)."""
    from benchharness.experiment.yamlnodes import is_null, mapping_items, node_error, suggest

    if is_null(node):
        raise node_error(node, "'roles' is empty; map a role to its factors, e.g. "
                               "roles: {workload: [size]}")
    given: dict[str, list[str]] = {r: [] for r in ROLES}
    seen: dict[str, tuple[str, object]] = {}
    for role, knode, vnode in mapping_items(node, "'roles'"):
        if role not in ROLES:
            raise node_error(knode, f"unknown role {role!r} in 'roles'; "
                                    f"{suggest(role, ROLES)} (roles: {', '.join(ROLES)})")
        if is_null(vnode):
            continue
        _role_entries(role, vnode, names, given, seen)
    return given


def _role_entries(role, vnode, names, given, seen) -> None:
    """Add the factors listed under one role to ``given``; each must be a factor and have
    no other role (``seen``: factor -> (role, node) so far)."""
    import yaml

    from benchharness.experiment.yamlnodes import node_error, scalar_text, suggest

    entries = vnode.value if isinstance(vnode, yaml.SequenceNode) else [vnode]
    for e in entries:
        f = scalar_text(e, f"an entry of roles.{role}")
        if f not in names:
            raise node_error(e, f"roles.{role}: {f!r} is not a factor; "
                                f"{suggest(f, names)} (factors: {', '.join(names)})")
        if f in seen:
            other, onode = seen[f]
            raise node_error(e, f"roles.{role}: {f!r} already has the role {other!r} "
                                f"(line {onode.start_mark.line + 1}); give each factor "
                                "one role")
        seen[f] = (role, e)
        given[role].append(f)


def _why_input(name: str, levels: list) -> str | None:
    """Why ``name`` looks like an input, or None."""
    low = name.lower()
    if low in _INPUT_NAMES:
        return "its name reads as an input"
    words = [w for w in re.split(r"[_\-.\s]+|(?<=[a-z])(?=[A-Z])", name) if w]
    for w in words:
        if w.lower() in _INPUT_WORDS:
            return f"its name contains {w!r}, which reads as an input"
    for label, values in levels:
        for k, v in (values or {}).items():
            if str(k).lower() in _INPUT_VALUE_KEYS:
                return f"its levels carry an input value ({label}: {k}={v})"
    labels = [str(lb) for lb, _v in levels]
    if labels and all(_file_like(lb) for lb in labels):
        return f"its levels look like input files ({labels[0]})"
    return None


def _file_like(label: str) -> bool:
    """A path (has a slash) or a file name with a lettered extension (``logs.txt``)."""
    if _is_number(label):
        return False
    return "/" in label or "\\" in label or bool(_FILE_NAME.fullmatch(label))


def _is_number(text: str) -> bool:
    try:
        float(text)
    except ValueError:
        return False
    return True


def guess_roles(factors: Iterable[str], levels: Mapping[str, list] | None = None,
                exclude: Iterable[str] = ()) -> Roles:
    """Roles when none are declared: input-looking factors are workloads, the rest settings.

    ``levels`` maps a factor to its levels, each a label or a ``(label,
    named values)`` pair. Factors in ``exclude`` (already conditions, e.g.
    from ``--across``) are left out of both lists.
    """
    levels = dict(levels or {})
    exclude = set(exclude)
    setting, workload, reasons = [], [], {}
    for f in factors:
        if f in exclude:
            continue
        lv = [x if isinstance(x, tuple) else (str(x), {}) for x in levels.get(f, [])]
        why = _why_input(f, lv)
        if why is None:
            setting.append(f)
            reasons[f] = "nothing marks it as an input"
        else:
            workload.append(f)
            reasons[f] = why
    return Roles(setting=tuple(setting), workload=tuple(workload), source="guessed",
                 reasons=reasons)


def factor_roles(experiment=None, factors: Iterable[str] | None = None,
                 levels: Mapping[str, list] | None = None, exclude: Iterable[str] = ()
                 ) -> Roles:
    """The declared roles of an experiment, else the guessed ones.

    ``factors``/``levels`` stand in for an experiment (a CSV source).
    """
    declared = declared_roles(experiment)
    if declared is not None:
        if factors is not None:
            keep = list(factors)
            return Roles(setting=tuple(f for f in declared.setting if f in keep),
                         workload=tuple(f for f in declared.workload if f in keep),
                         environment=tuple(f for f in declared.environment if f in keep),
                         source=declared.source)
        return declared
    if experiment is not None and is_response_surface(experiment):
        left_out = set(exclude)
        names = [f for f in (list(factors) if factors is not None
                             else list(experiment.factor_names)) if f not in left_out]
        return Roles(setting=tuple(names), source="guessed",
                     reasons={f: SURFACE_REASON for f in names})
    if experiment is not None:
        lv = _factor_labels(experiment)
        names = list(factors) if factors is not None else list(experiment.factor_names)
        lv.update({f: v for f, v in (levels or {}).items() if f not in lv})
    else:
        names = list(factors or [])
        lv = dict(levels or {})
    return guess_roles(names, lv, exclude=exclude)


def is_response_surface(experiment) -> bool:
    """Whether the experiment's ``design:`` is a response surface (its factors are the
    settings whose values it proposes, whatever their names suggest)."""
    from benchharness.design.surface import TYPE, type_node_of

    node = (getattr(experiment, "sections", None) or {}).get("design")
    return getattr(type_node_of(node), "value", None) == TYPE


def surface_guess(roles: Roles) -> bool:
    """Whether ``roles`` were guessed from a response-surface design (every factor a
    setting because the surface chooses values for all of them)."""
    return (not roles.declared and bool(roles.reasons)
            and set(roles.reasons.values()) == {SURFACE_REASON})


def declaration_text(roles: Roles) -> str:
    """The ``roles:`` line that declares ``roles`` (for suggestions)."""
    parts = [f"{r}: [{', '.join(getattr(roles, r))}]" for r in ("workload", "environment")
             if getattr(roles, r)]
    if not parts:
        parts = [f"setting: [{', '.join(roles.setting)}]"]
    return "roles: {" + ", ".join(parts) + "}"

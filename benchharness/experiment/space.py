"""Configuration spaces that are not full grids: excluded combinations and conditional factors.

Two keys of the experiment file say which combinations of levels exist:

``exclude:`` a list of rules; each rule is a mapping of factors to a level or a
list of levels, and removes every combination that matches all of them. An
optional ``why:`` says the reason, shown by ``plan``::

    exclude:
      - {codec: lzma, corpus: logs, why: "lzma takes minutes on the log corpus"}

``only_when:`` factors that apply only under a condition on other factors. The
condition maps each factor to a level, a list of levels or ``{not: ...}``; all
must hold::

    only_when:
      level: {codec: [zlib, lzma]}        # or  level: {codec: {not: none}}

Where a conditional factor does not apply, its combinations collapse into one
and its runs carry the level `NOT_APPLIED` (``-``) in ``plan.csv`` and
``runs.csv``. Its placeholders render empty, and in a command written as a
list every argument that holds one is left out whole (write ``--level={level}``
as one argument so the flag goes too).

Everything here is plain data built from YAML nodes; errors are located at
``FILE:LINE:COL`` of the offending node (`benchharness.experiment.yamlnodes`).
The analysis of the resulting incomplete factorial is in
`benchharness.analysis.incomplete`.
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass, field
from typing import Mapping, Sequence

import yaml

# the level a conditional factor carries in cells where it does not apply
from benchharness.experiment import NOT_APPLIED
from benchharness.experiment.yamlnodes import (
    is_null, kind, mapping_items, node_error, scalar_text, sequence_items, suggest,
)

#: Keys of the experiment file owned here.
KEYS = ("exclude", "only_when")
#: Most combinations enumerated to apply the rules (the planned-run limit comes first).
MAX_COMBINATIONS = 2_000_000


@dataclass(frozen=True)
class Condition:
    """Levels allowed per factor; holds when every factor is at one of its allowed levels."""

    allowed: tuple[tuple[str, frozenset], ...]
    text: str

    def holds(self, levels: Mapping[str, str]) -> bool:
        return all(levels[f] in ok for f, ok in self.allowed)

    @property
    def factors(self) -> tuple[str, ...]:
        return tuple(f for f, _ in self.allowed)


@dataclass(frozen=True)
class Rule:
    """One ``exclude:`` rule: the combinations matching ``match`` are removed."""

    match: Condition
    why: str
    line: int
    col: int

    def to_dict(self) -> dict:
        return {"rule": self.match.text, "why": self.why, "line": self.line}


@dataclass(frozen=True)
class Space:
    """The combinations that exist: conditional factors and exclusion rules (plain data)."""

    conditions: Mapping[str, Condition] = field(default_factory=dict)
    rules: tuple[Rule, ...] = ()
    #: located warnings found while parsing (a rule that removes nothing)
    warnings: tuple[str, ...] = ()

    def off(self, levels: Mapping[str, str]) -> frozenset:
        """Conditional factors that do not apply in this cell."""
        return frozenset(f for f, c in self.conditions.items()
                         if levels.get(f) == NOT_APPLIED or not c.holds(levels))

    def parents(self, factor: str) -> tuple[str, ...]:
        c = self.conditions.get(factor)
        return c.factors if c is not None else ()

    def levels_in_runs(self, factor: str, labels: Sequence[str]) -> tuple[str, ...]:
        """The labels a factor's runs carry: a conditional factor adds `NOT_APPLIED`."""
        return tuple(labels) + ((NOT_APPLIED,) if factor in self.conditions else ())


@dataclass(frozen=True)
class Cells:
    """The combinations that remain, in listed order, and what was removed and why."""

    cells: list
    full: int                      # combinations of the full grid
    collapsed: dict                # conditional factor -> [combinations, cells] where off
    removed: list                  # per rule: combinations it removed

    def to_json_dict(self, space: Space) -> dict:
        return {"combinations": self.full, "cells": len(self.cells),
                "conditional": {f: {"applies_when": c.text, "combinations_without": self.collapsed[f][0],
                                    "cells_without": self.collapsed[f][1],
                                    "level_where_not": NOT_APPLIED}
                                for f, c in space.conditions.items()},
                "excluded": [dict(r.to_dict(), removed=n)
                             for r, n in zip(space.rules, self.removed)]}


def parse_space(nodes: Mapping[str, yaml.Node], factors, path: str) -> Space | None:
    """The ``exclude:`` and ``only_when:`` keys of the file (None when neither is given).

    ``factors`` are the parsed `Factor` objects. Raises `ExperimentError` at the
    offending node: an unknown factor or level, a condition that can never hold,
    a conditional factor with a level spelt ``-``, rules that leave nothing to run.
    """
    ex, ow = nodes.get("exclude"), nodes.get("only_when")
    if is_null(ex) and is_null(ow):
        return None
    levels = {f.name: tuple(f.labels) for f in factors}
    conditions: dict[str, Condition] = {}
    if not is_null(ow):
        for fname, knode, vnode in mapping_items(ow, "'only_when'"):
            if fname not in levels:
                raise node_error(knode, f"'only_when' names the factor {fname!r}, which is "
                                        f"not declared; {_factor_hint(fname, levels)}", path)
            if NOT_APPLIED in levels[fname]:
                raise node_error(knode, f"factor {fname!r} has a level {NOT_APPLIED!r}, which "
                                        "marks where a conditional factor does not apply; "
                                        "rename that level", path)
            cond = _condition(vnode, levels, f"'only_when: {fname}'", path, exclude=fname)
            conditions[fname] = cond
        for fname, cond in conditions.items():
            for parent in cond.factors:
                if parent in conditions:
                    node = next(k for k, _v in ow.value if k.value == fname)
                    raise node_error(node, f"the condition of {fname!r} names {parent!r}, "
                                           "which is conditional itself; make a condition "
                                           "depend only on factors that always apply", path)
    rules: list[Rule] = []
    if not is_null(ex):
        for item in sequence_items(ex, "'exclude'"):
            rules.append(_rule(item, levels, conditions, path))
    space = Space(conditions=conditions, rules=tuple(rules))
    for fname, cond in conditions.items():
        _check_condition_holds(space, fname, cond, factors, ow, path)
    result = enumerate_cells(space, factors)
    if not result.cells:
        last = max((r for r, n in zip(space.rules, result.removed) if n), key=lambda r: r.line,
                   default=None)
        where = dict(path=path, line=last.line, col=last.col) if last else dict(path=path)
        from benchharness.errors import ExperimentError

        raise ExperimentError("the 'exclude' rules remove every combination of the factors, "
                              "so nothing would run; narrow a rule (this one removes the last "
                              "of them)", **where)
    from dataclasses import replace

    return replace(space, warnings=tuple(warnings_for(space, result, path)))


def _factor_hint(name: str, levels) -> str:
    return suggest(name, levels).replace("known keys", "factors are")


def _level_set(node: yaml.Node, fname: str, labels, what: str, path: str) -> frozenset:
    """A level or a list of levels of ``fname`` (each checked against its labels)."""
    items = node.value if isinstance(node, yaml.SequenceNode) else [node]
    if isinstance(node, yaml.SequenceNode) and not items:
        raise node_error(node, f"{what} lists no level of {fname!r}; give one or a list", path)
    out = []
    for it in items:
        if not isinstance(it, yaml.ScalarNode) or is_null(it):
            raise node_error(it, f"{what}: a level of {fname!r} must be a single value, not "
                                 f"{kind(it)}", path)
        if it.value not in labels:
            raise node_error(it, f"{what}: {it.value!r} is not a level of {fname!r}; its "
                                 f"levels are {', '.join(labels)}", path)
        out.append(it.value)
    return frozenset(out)


def _describe(allowed, levels, negated=()) -> str:
    """``codec=zlib, corpus in {logs, dumps}``, or in words for a condition
    (``codec is not none and corpus is logs``), in listed level order."""
    parts = []
    for f, ok in allowed:
        shown = [lv for lv in levels[f] if lv in ok]
        if negated is None:
            parts.append(f"{f}={shown[0]}" if len(shown) == 1
                         else f"{f} in {{{', '.join(shown)}}}")
        elif f in negated:
            gone = [lv for lv in levels[f] if lv not in ok]
            parts.append(f"{f} is not " + " or ".join(gone))
        else:
            parts.append(f"{f} is " + " or ".join(shown))
    return ", ".join(parts) if negated is None else " and ".join(parts)


def _condition(node, levels, what: str, path: str, exclude: str | None = None,
               words: bool = True) -> Condition:
    """``{factor: level | [levels] | {not: level | [levels]}}`` -> `Condition`."""
    if is_null(node) or not isinstance(node, yaml.MappingNode) or not node.value:
        raise node_error(node, f"{what} must map factors to the levels where it applies, e.g. "
                               "{codec: [zlib, lzma]} or {codec: {not: none}}", path)
    allowed, negated = [], set()
    for f, knode, vnode in mapping_items(node, what):
        if f not in levels:
            raise node_error(knode, f"{what} names the factor {f!r}, which is not declared; "
                                    f"{_factor_hint(f, levels)}", path)
        if f == exclude:
            raise node_error(knode, f"{what}: a factor cannot depend on itself", path)
        if isinstance(vnode, yaml.MappingNode):
            items = mapping_items(vnode, f"{what}: {f}")
            if len(items) != 1 or items[0][0] != "not":
                raise node_error(vnode, f"{what}: {f} takes a level, a list of levels or "
                                        "{not: level-or-list}", path)
            ok = frozenset(levels[f]) - _level_set(items[0][2], f, levels[f], what, path)
            if not ok:
                raise node_error(vnode, f"{what}: 'not' leaves no level of {f!r}", path)
            negated.add(f)
        else:
            ok = _level_set(vnode, f, levels[f], what, path)
        allowed.append((f, ok))
    return Condition(tuple(allowed), _describe(allowed, levels, negated if words else None))


def _rule(item, levels, conditions, path: str) -> Rule:
    what = "an 'exclude' rule"
    if not isinstance(item, yaml.MappingNode) or not item.value:
        raise node_error(item, f"{what} must map factors to levels, e.g. "
                               "{codec: lzma, corpus: logs, why: \"too slow\"}", path)
    why = ""
    match = []
    for f, knode, vnode in mapping_items(item, what):
        if f == "why" and f not in levels:
            why = scalar_text(vnode, "'why'") if not is_null(vnode) else ""
            continue
        match.append((knode, vnode))
    if not match:
        raise node_error(item, f"{what} names no factor; give the levels it removes, e.g. "
                               "{codec: lzma, corpus: logs}", path)
    sub = yaml.MappingNode("tag:yaml.org,2002:map", match, item.start_mark, item.end_mark)
    cond = _condition(sub, levels, what, path, words=False)
    return Rule(match=cond, why=why, line=item.start_mark.line + 1,
                col=item.start_mark.column + 1)


def _check_condition_holds(space: Space, fname: str, cond: Condition, factors, ow, path):
    for f, ok in cond.allowed:
        if not ok:   # pragma: no cover - refused while parsing
            raise node_error(ow, f"the condition of {fname!r} never holds", path)
    full = all(len(ok) == len(space_levels(factors, f)) for f, ok in cond.allowed)
    if full:
        node = next(k for k, _v in ow.value if k.value == fname)
        raise node_error(node, f"the condition of {fname!r} ({cond.text}) holds for every "
                               "level, so the factor always applies; remove it from "
                               "'only_when'", path)


def space_levels(factors, name: str) -> tuple[str, ...]:
    for f in factors:
        if f.name == name:
            return tuple(f.labels)
    raise KeyError(name)


def enumerate_cells(space: Space, factors) -> Cells:
    """The combinations that remain, first factor varying slowest (listed order).

    A conditional factor that does not apply takes `NOT_APPLIED`, which merges
    the combinations that differ only in it; then each exclusion rule removes
    the combinations it matches (the first matching rule is counted).
    """
    from benchharness.errors import ExperimentError

    names = [f.name for f in factors]
    full = 1
    for f in factors:
        full *= len(f.levels)
    if full > MAX_COMBINATIONS:
        raise ExperimentError(f"'exclude'/'only_when' are applied by listing every combination, "
                              f"and this experiment has {full:,} (more than "
                              f"{MAX_COMBINATIONS:,}); use fewer factors or levels")
    seen: dict[tuple, dict] = {}
    collapsed = {f: [0, 0] for f in space.conditions}   # combinations, cells where off
    removed = [0] * len(space.rules)
    kept = []
    for combo in itertools.product(*(f.labels for f in factors)):
        levels = dict(zip(names, combo))
        for fname, cond in space.conditions.items():
            if not cond.holds(levels):
                levels[fname] = NOT_APPLIED
        key = tuple(levels[n] for n in names)
        for fname in space.conditions:
            if levels[fname] == NOT_APPLIED:
                collapsed[fname][0] += 1
                collapsed[fname][1] += key not in seen
        if key in seen:
            continue
        seen[key] = levels
        hit = next((i for i, r in enumerate(space.rules) if _matches(r.match, levels)), None)
        if hit is not None:
            removed[hit] += 1
            continue
        kept.append(levels)
    return Cells(cells=kept, full=full, collapsed=collapsed, removed=removed)


def _matches(cond: Condition, levels) -> bool:
    return all(levels[f] in ok for f, ok in cond.allowed)


def describe(space: Space, cells: Cells) -> list[str]:
    """``plan``'s lines on the space: what each condition merged and each rule removed."""
    from benchharness.numbers import plural

    lines = [f"space       {len(cells.cells)} of {plural(cells.full, 'combination')} run"]
    for f, c in space.conditions.items():
        combos, n = cells.collapsed[f]
        lines.append(f"  {f} applies only where {c.text}: elsewhere its runs carry the level "
                     f"{NOT_APPLIED!r} and its placeholders are left out "
                     f"({plural(combos, 'combination')} without it, run as "
                     f"{plural(n, 'cell')})")
    for r, n in zip(space.rules, cells.removed):
        why = f": {r.why}" if r.why else ""
        lines.append(f"  excluded {r.match.text} (line {r.line}){why}: "
                     f"{plural(n, 'combination')} removed")
    return lines


def warnings_for(space: Space, cells: Cells, path: str) -> list[str]:
    """A rule that removes nothing is kept but said (it names a combination that does not exist)."""
    out = []
    for r, n in zip(space.rules, cells.removed):
        if n == 0:
            out.append(f"{path}:{r.line}:{r.col}: the 'exclude' rule {r.match.text} removes no "
                       "combination (an earlier rule or a condition already did, or a "
                       "conditional factor does not apply there); remove it")
    return out

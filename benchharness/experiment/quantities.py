"""Numeric factors: which factors are quantities, and which set how much runs in parallel.

A factor is a *quantity* when every level label reads as a finite number
(``n: [1000, 10000, 100000]``, ``threads: [1, 2, 4, 8]``) and does not read as a
version (a name like ``python_version``, or a label such as ``3.10`` or ``010``
that a quantity would not be written as): its levels keep their values, and the analysis adds a trend over them beside the ANOVA
(`benchharness.analysis.trend`). The experiment file may say so explicitly, or
say the opposite, in one top-level section::

    numeric:
      n: yes              # a quantity (the default when its levels are numbers)
      threads: parallel   # a quantity that sets how many workers run at once
      level: no           # numbers, but analysed as labels only

A list of names (``numeric: [n, threads]``) declares each a quantity. A
quantity named like a parallelism setting (``threads``, ``workers``, ``jobs``,
``procs``, ``cores`` ... as a whole name or a word of it) is a parallel
factor without being declared: the analysis adds its speed-up, parallel
efficiency and serial fraction (`benchharness.analysis.scaling`).

Errors (an unknown factor, a value other than yes / no / parallel, a factor
declared numeric whose levels are not all numbers, a parallel factor with a
level that is not a positive number) are one line at ``FILE:LINE:COL``.
Standard library only: ``plan`` shows the quantities without importing
anything heavy.
"""

from __future__ import annotations

import math
import re

__all__ = ["KINDS", "PARALLEL_WORDS", "level_values", "parallel_name", "declared_numeric",
           "numeric_factors"]

#: what a factor may be declared as in ``numeric:``
KINDS = ("yes", "no", "parallel")

#: words of a factor name that make a quantity a parallelism setting (common practice)
PARALLEL_WORDS = frozenset({
    "threads", "thread", "nthreads", "workers", "worker", "nworkers", "jobs", "njobs",
    "procs", "nprocs", "processes", "cores", "ncores", "parallel", "parallelism",
    "concurrency", "ranks", "tasks",
})

_YES = {"yes", "true", "on", "numeric", "quantity"}
_NO = {"no", "false", "off", "labels", "categorical"}


def level_values(labels) -> list[float] | None:
    """The number every label reads as, or None unless all are distinct finite numbers."""
    values = []
    for label in labels:
        try:
            v = float(str(label).strip().replace("_", "x"))   # 1_000 is a label, not a number
        except ValueError:
            return None
        if not math.isfinite(v):
            return None
        values.append(v)
    if len(values) < 2 or len(set(values)) != len(values):
        return None
    return values


#: words of a factor name that make numbers version labels, not quantities (common practice)
VERSION_WORDS = frozenset({"version", "ver", "release", "python", "py", "gcc", "clang",
                           "llvm", "jdk", "java", "node", "kernel", "api", "abi", "std"})


def version_like(name: str, labels) -> bool:
    """Numbers that read as versions: a name like ``python_version``, or labels written
    like ``3.10`` or ``010`` (a trailing or leading zero a quantity would not carry)."""
    if not VERSION_WORDS.isdisjoint(_name_words(name)):
        return True
    for label in labels:
        text = str(label).strip().lstrip("+-")
        whole, _, frac = text.partition(".")
        if (frac and frac.endswith("0") and "e" not in frac.lower()) or \
                (len(whole) > 1 and whole.startswith("0")):
            return True
    return False


def parallel_name(name: str) -> bool:
    """Whether a factor's name reads as a parallelism setting (``threads``, ``n_workers``)."""
    return not PARALLEL_WORDS.isdisjoint(_name_words(name))


def _name_words(name: str) -> list[str]:
    """A factor name's words, lower case: ``n_workers`` -> ``["n", "workers"]``."""
    return [w for w in re.split(r"[^a-z0-9]+", str(name).lower()) if w]


def declared_numeric(experiment) -> dict[str, str]:
    """The validated ``numeric:`` section: factor -> ``yes`` | ``no`` | ``parallel``.

    Raises `ExperimentError` at ``FILE:LINE:COL`` for an unknown factor, an
    unknown kind, or levels that cannot be what is declared.
    """
    from benchharness.experiment.yamlnodes import is_null

    node = (getattr(experiment, "sections", None) or {}).get("numeric")
    if node is None or is_null(node):
        return {}
    path = getattr(experiment, "path", None)
    factors = {f.name: f for f in experiment.factors}
    out: dict[str, str] = {}
    for name, knode, kind, vnode in _numeric_items(node, path):
        out[name] = _checked_kind(name, knode, kind, vnode, factors, out, path)
    return out


def _numeric_items(node, path) -> list[tuple]:
    """The ``numeric:`` section's entries as (factor, key node, kind as written, value node):
    a list means ``yes`` for each factor named; a mapping gives each factor its kind."""
    import yaml

    from benchharness.experiment.yamlnodes import is_null, mapping_items, node_error, scalar_text

    items = []
    if isinstance(node, yaml.SequenceNode):
        for item in node.value:
            items.append((scalar_text(item, "'numeric'"), item, "yes", item))
    elif isinstance(node, yaml.MappingNode):
        for key, knode, vnode in mapping_items(node, "'numeric'"):
            kind = "yes" if is_null(vnode) else scalar_text(vnode, f"'numeric: {key}'").lower()
            items.append((key, knode, kind, vnode))
    else:
        raise node_error(node, "'numeric' lists the factors that are quantities, e.g. "
                               "numeric: {n: yes, threads: parallel}", path)
    return items


def _checked_kind(name: str, knode, kind: str, vnode, factors: dict, seen: dict,
                  path) -> str:
    """One entry's kind (``yes``, ``no`` or ``parallel``), checked against the factor it
    names and that factor's levels; raises `ExperimentError` at the entry otherwise."""
    from benchharness.experiment.yamlnodes import node_error, suggest

    if name not in factors:
        hint = suggest(name, factors)
        hint = hint if hint.startswith("did you") else "factors: " + ", ".join(factors)
        raise node_error(knode, f"'numeric' names {name!r}, which is not a factor; {hint}",
                         path)
    if name in seen:
        raise node_error(knode, f"'numeric' names {name!r} twice; name each factor once",
                         path)
    kind = "yes" if kind in _YES else "no" if kind in _NO else kind
    if kind not in KINDS:
        raise node_error(vnode, f"'numeric: {name}' is {kind!r}; use yes, no or parallel",
                         path)
    labels = list(factors[name].labels)
    values = level_values(labels)
    if kind != "no" and values is None:
        raise node_error(knode, f"factor {name!r} is declared numeric but its levels "
                         f"({', '.join(labels)}) are not all distinct numbers; give numbers "
                         "or write no", path)
    if kind == "parallel" and min(values) <= 0:
        raise node_error(knode, f"factor {name!r} is declared parallel but has a level "
                         f"{labels[values.index(min(values))]} that is not a positive count; "
                         "give counts of 1 or more", path)
    return kind


def numeric_factors(experiment=None, names=(), levels=None) -> dict[str, dict]:
    """Every quantity among the factors: name -> {values, parallel, source}.

    ``names``/``levels`` default to the experiment's; a bare table (no
    experiment) has its quantities recognised from the labels and names alone.
    ``source`` says why: ``declared`` or ``levels are numbers``.
    """
    if experiment is not None and not names:
        names = list(experiment.factor_names)
    if levels is None:
        levels = {f.name: list(f.labels) for f in getattr(experiment, "factors", ())}
    declared = declared_numeric(experiment) if experiment is not None else {}
    out = {}
    for name in names:
        kind = declared.get(name)
        if kind == "no":
            continue
        values = level_values(levels.get(name) or ())
        if values is None or (kind is None and version_like(name, levels.get(name) or ())):
            continue       # a version such as 3.10 is a label unless declared numeric
        parallel = kind == "parallel" or (parallel_name(name) and min(values) > 0)
        out[name] = {"values": values, "parallel": parallel,
                     "source": "declared" if kind else "levels are numbers"}
    return out


def plan_lines(experiment) -> list[str]:
    """What `plan` says about the quantities: which factors get a trend, which scaling."""
    from benchharness.experiment.roles import is_response_surface

    if is_response_surface(experiment):
        # analysis/numeric.py leaves a surface's settings to its second-order fit
        return ["numeric     every setting, as a quantity in the response surface's "
                "second-order fit (no separate trends or speed-up)"]
    found = numeric_factors(experiment)
    declared = declared_numeric(experiment)
    labels = [n for n, k in declared.items() if k == "no"]
    if not found and not labels:
        return []
    parts = [f"{n} (parallel: speed-up, efficiency, serial fraction)" if q["parallel"]
             else f"{n} (trend over log {n})" if min(q["values"]) > 0
             else f"{n} (polynomial contrasts; no log-log trend, a level is not positive)"
             for n, q in found.items()]
    line = "numeric     " + (", ".join(parts) if parts else "none")
    guessed = [n for n, q in found.items() if q["source"] != "declared"]
    if guessed:
        line += (f"; recognised from the levels: {', '.join(guessed)} (numeric: "
                 f"{{{guessed[0]}: no}} analyses a factor as labels only)")
    if labels:
        line += f"; analysed as labels only: {', '.join(labels)}"
    return [line]

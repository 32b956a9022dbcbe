"""Reading composed YAML nodes with their source positions.

The experiment file is *composed* (``yaml.compose``), not loaded: we keep the
node tree so that every error can point at ``FILE:LINE:COL``, and so that a
level label is the scalar's source text (``1.10`` stays ``1.10``, ``off`` stays
``off``) instead of whatever a loader's type guessing makes of it. Composing
constructs no Python objects, so tags such as ``!!python/object`` are inert;
we reject any non-standard tag outright.

Capability modules (gate, design, metrics, ...) validate their own section of
the experiment file with these helpers.
"""

from __future__ import annotations

import difflib
import re
from typing import Any, Iterable

import yaml

from benchharness.errors import ExperimentError

_STD_TAGS = {
    "tag:yaml.org,2002:str", "tag:yaml.org,2002:int", "tag:yaml.org,2002:float",
    "tag:yaml.org,2002:bool", "tag:yaml.org,2002:null", "tag:yaml.org,2002:map",
    "tag:yaml.org,2002:seq", "tag:yaml.org,2002:timestamp",
}


def node_error(node: yaml.Node | None, message: str, path: str | None = None) -> ExperimentError:
    """An `ExperimentError` located at ``node`` (1-based line and column)."""
    if node is None or node.start_mark is None:
        return ExperimentError(message, path=path)
    mark = node.start_mark
    return ExperimentError(message, path=path or mark.name, line=mark.line + 1,
                           col=mark.column + 1)


def check_tags(node: yaml.Node) -> None:
    """Reject tags that would construct objects (``!!python/...``, custom ``!foo``)."""
    stack = [node]
    seen: set[int] = set()  # an alias is a shared node: check it once, not once per use
    while stack:
        n = stack.pop()
        if id(n) in seen:
            continue
        seen.add(id(n))
        if n.tag not in _STD_TAGS:
            raise node_error(n, f"YAML tag {n.tag!r} is not allowed; write plain values "
                                "(strings, numbers, lists, mappings)")
        if isinstance(n, yaml.MappingNode):
            for k, v in n.value:
                stack.extend((k, v))
        elif isinstance(n, yaml.SequenceNode):
            stack.extend(n.value)


def kind(node: yaml.Node) -> str:
    """Plain word for a node's type, for messages."""
    if isinstance(node, yaml.MappingNode):
        return "a mapping"
    if isinstance(node, yaml.SequenceNode):
        return "a list"
    if node.tag.endswith(":null"):
        return "nothing (null)"
    return f"the scalar {node.value!r}"


def is_null(node: yaml.Node | None) -> bool:
    return node is None or (isinstance(node, yaml.ScalarNode) and node.tag.endswith(":null"))


def scalar_text(node: yaml.Node, what: str = "value") -> str:
    """The source text of a scalar node (never re-typed)."""
    if not isinstance(node, yaml.ScalarNode):
        raise node_error(node, f"{what} must be a single value, not {kind(node)}")
    return node.value


def mapping_items(node: yaml.Node, what: str) -> list[tuple[str, yaml.Node, yaml.Node]]:
    """``[(key text, key node, value node)]`` of a mapping node; duplicate keys are errors."""
    if not isinstance(node, yaml.MappingNode):
        raise node_error(node, f"{what} must be a mapping (key: value lines), not {kind(node)}")
    seen: dict[str, yaml.Node] = {}
    out = []
    for knode, vnode in node.value:
        key = scalar_text(knode, f"a key in {what}")
        if key in seen:
            line = seen[key].start_mark.line + 1
            raise node_error(knode, f"{what} has the key {key!r} twice (first on line {line}); "
                                    "keep one")
        seen[key] = knode
        out.append((key, knode, vnode))
    return out


def suggest(word: str, known: Iterable[str]) -> str:
    """``"did you mean 'x'?"`` clause for the closest known word, or a list of known words."""
    known = sorted(known)
    close = difflib.get_close_matches(word, known, n=1, cutoff=0.6)
    if close:
        return f"did you mean {close[0]!r}?"
    return "known keys: " + ", ".join(known)


def expect_mapping(node: yaml.Node, what: str, allowed: Iterable[str],
                   required: Iterable[str] = ()) -> dict[str, yaml.Node]:
    """Validate a mapping's keys; returns ``{key: value node}``."""
    allowed = set(allowed)
    out: dict[str, yaml.Node] = {}
    for key, knode, vnode in mapping_items(node, what):
        if key not in allowed:
            raise node_error(knode, f"unknown key {key!r} in {what}; {suggest(key, allowed)}")
        out[key] = vnode
    for key in required:
        if key not in out:
            raise node_error(node, f"{what} needs the key {key!r}")
    return out


def sequence_items(node: yaml.Node, what: str) -> list[yaml.Node]:
    if not isinstance(node, yaml.SequenceNode):
        raise node_error(node, f"{what} must be a list, not {kind(node)}")
    return list(node.value)


def as_int(node: yaml.Node, what: str, minimum: int | None = None) -> int:
    text = scalar_text(node, what)
    try:
        if not re.fullmatch(r"[+-]?\d+", text.replace("_", "")):
            raise ValueError
        value = int(text.replace("_", ""))
    except ValueError:
        raise node_error(node, f"{what} must be a whole number, not {text!r}") from None
    if minimum is not None and value < minimum:
        raise node_error(node, f"{what} must be at least {minimum}, not {value}")
    return value


def as_float(node: yaml.Node, what: str, minimum: float | None = None,
             maximum: float | None = None) -> float:
    text = scalar_text(node, what)
    try:
        value = float(text)
    except ValueError:
        raise node_error(node, f"{what} must be a number, not {text!r}") from None
    if minimum is not None and value < minimum:
        raise node_error(node, f"{what} must be at least {minimum}, not {text}")
    if maximum is not None and value > maximum:
        raise node_error(node, f"{what} must be at most {maximum}, not {text}")
    return value


TRUE_WORDS = {"true", "yes", "on", "True", "TRUE", "Yes", "YES", "On", "ON"}
FALSE_WORDS = {"false", "no", "off", "False", "FALSE", "No", "NO", "Off", "OFF"}


def as_bool(node: yaml.Node, what: str) -> bool:
    text = scalar_text(node, what)
    if text in TRUE_WORDS:
        return True
    if text in FALSE_WORDS:
        return False
    raise node_error(node, f"{what} must be true or false, not {text!r}")


_DURATION = re.compile(r"^\s*(\d+(?:\.\d+)?|\.\d+)\s*(ms|s|m|h)?\s*$")
_DURATION_PART = re.compile(r"\s*(\d+(?:\.\d+)?|\.\d+)\s*(ms|h|m|s)")
_UNIT_S = {"ms": 0.001, "s": 1.0, "m": 60.0, "h": 3600.0, None: 1.0}
_UNIT_RANK = {"h": 0, "m": 1, "s": 2, "ms": 3}


def parse_duration_s(text: str) -> float | None:
    """``"90s"`` → 90.0, ``"5m"`` → 300.0, ``"250ms"`` → 0.25, ``"2"`` → 2.0,
    ``"1h30m"`` → 5400.0, ``"2m 30s"`` → 150.0 (units from largest to smallest, each
    once); None if malformed."""
    m = _DURATION.match(text)
    if m:
        return float(m.group(1)) * _UNIT_S[m.group(2)]
    t = text.strip()
    total, pos, rank = 0.0, 0, -1
    while pos < len(t):
        part = _DURATION_PART.match(t, pos)
        if part is None or _UNIT_RANK[part.group(2)] <= rank:
            return None
        rank = _UNIT_RANK[part.group(2)]
        total += float(part.group(1)) * _UNIT_S[part.group(2)]
        pos = part.end()
    return total if rank >= 0 else None


#: Longest duration a file may give (24 days): waits are counted in milliseconds in a
#: 32-bit number (``poll``), so anything longer could not be waited for at all.
MAX_DURATION_S = 24 * 86400.0


def as_duration_s(node: yaml.Node, what: str) -> float:
    text = scalar_text(node, what)
    value = parse_duration_s(text)
    if value is None or value <= 0:
        raise node_error(node, f"{what} {text!r} is not a duration; write a positive number "
                               "with a unit, like 90s, 5m, 1h30m or 250ms")
    if value > MAX_DURATION_S:
        raise node_error(node, f"{what} {text!r} is longer than the harness can wait (at most "
                               f"24 days, {MAX_DURATION_S / 3600:g}h); give a shorter one, or "
                               "none for no limit")
    return value


def parse_percent(text: str) -> float | None:
    """``"5%"`` → 0.05; a bare number below 1 is a fraction (``0.05``); None if malformed."""
    t = text.strip()
    try:
        if t.endswith("%"):
            return float(t[:-1]) / 100.0
        v = float(t)
    except ValueError:
        return None
    return v if v < 1 else v / 100.0


def as_percent(node: yaml.Node, what: str) -> float:
    text = scalar_text(node, what)
    value = parse_percent(text)
    if value is None or value < 0:
        raise node_error(node, f"{what} must be a percentage like 5% (or a fraction like 0.05), "
                               f"not {text!r}")
    return value


def as_str(node: yaml.Node, what: str) -> str:
    if is_null(node):
        raise node_error(node, f"{what} is empty; give it a value")
    return scalar_text(node, what)


def to_plain(node: yaml.Node | None) -> Any:
    """Plain Python value of a node; scalars stay their source strings (nulls become None)."""
    if node is None or is_null(node):
        return None
    if isinstance(node, yaml.MappingNode):
        return {scalar_text(k): to_plain(v) for k, v in node.value}
    if isinstance(node, yaml.SequenceNode):
        return [to_plain(v) for v in node.value]
    return node.value

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
from benchharness.values import ValueFormError, parse_duration, parse_ratio
from benchharness.values import parse_percent as _parse_percent

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


def parse_duration_s(text: str) -> float | None:
    """Seconds of ``"90s"``, ``"5m"``, ``"250ms"``, ``"1h30m"``, ``"2m 30s"`` (the one
    duration reading, `benchharness.values.parse_duration`: units required); None if
    malformed."""
    try:
        return parse_duration(text)
    except ValueFormError:
        return None


#: Longest duration a file may give (24 days): waits are counted in milliseconds in a
#: 32-bit number (``poll``), so anything longer could not be waited for at all.
MAX_DURATION_S = 24 * 86400.0


def as_duration_s(node: yaml.Node, what: str) -> float:
    text = scalar_text(node, what)
    try:
        value = parse_duration(text)
    except ValueFormError as exc:
        raise node_error(node, f"{what}: {exc}") from None
    if value <= 0:
        raise node_error(node, f"{what} {text!r} is not a positive duration; write e.g. 90s, "
                               "5m, 1h30m or 250ms")
    if value > MAX_DURATION_S:
        raise node_error(node, f"{what} {text!r} is longer than the harness can wait (at most "
                               f"24 days, {MAX_DURATION_S / 3600:g}h); give a shorter one, or "
                               "none for no limit")
    return value


def parse_percent(text: str) -> float | None:
    """``"5%"`` -> 0.05 and ``"0.05"`` -> 0.05 (the one percentage reading,
    `benchharness.values.parse_percent`: a bare number >= 1 is refused); None if
    malformed."""
    try:
        return _parse_percent(text)
    except ValueFormError:
        return None


def as_percent(node: yaml.Node, what: str) -> float:
    text = scalar_text(node, what)
    try:
        value = _parse_percent(text)
    except ValueFormError as exc:
        raise node_error(node, f"{what}: {exc}") from None
    if value < 0:
        raise node_error(node, f"{what} must be a percentage of at least 0%, like 5% (or the "
                               f"fraction 0.05), not {text!r}")
    return value


def as_ratio(node: yaml.Node, what: str) -> float:
    """A ratio (``1.05``, ``1.05x`` or ``5%`` meaning 1.05), `benchharness.values.parse_ratio`."""
    text = scalar_text(node, what)
    mark = node.start_mark
    where = f"{mark.name}:{mark.line + 1}:{mark.column + 1}: " if mark is not None else ""
    try:
        return parse_ratio(text, what=f"{where}{what}")
    except ValueFormError as exc:
        raise node_error(node, f"{what}: {exc}") from None


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

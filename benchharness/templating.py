"""Templates in the experiment file: ``{factor}`` and ``{factor.name}``.

A template is a string with placeholders naming a factor (replaced by the
level's label) or a named value of the level (``{build.bin}``). ``{{`` and
``}}`` stand for literal braces. Substitution is purely textual and never
re-splits: a level value always becomes part of exactly one argument. When a
command runs through a shell, each substituted value is quoted with
`shlex.quote` so it stays one word and is never interpreted.
"""

from __future__ import annotations

import re
import shlex
from dataclasses import dataclass
from typing import Callable, Mapping

_PLACEHOLDER = re.compile(r"\{\{|\}\}|\{([^{}]*)\}")


@dataclass(frozen=True)
class Placeholder:
    factor: str
    name: str | None  # the named value, or None for the label itself
    text: str


def placeholders(template: str) -> list[Placeholder]:
    """The placeholders of a template, in order. Malformed braces raise ValueError."""
    out = []
    pos = 0
    for m in _PLACEHOLDER.finditer(template):
        between = template[pos:m.start()]
        if "{" in between or "}" in between:
            raise ValueError(f"unmatched brace in {template!r}; write {{{{ or }}}} for a "
                             "literal brace")
        pos = m.end()
        if m.group(0) in ("{{", "}}"):
            continue
        inner = m.group(1)
        if not inner.strip():
            raise ValueError(f"empty placeholder {{}} in {template!r}; write {{factor}}")
        factor, _, name = inner.partition(".")
        out.append(Placeholder(factor=factor, name=name or None, text=m.group(0)))
    rest = template[pos:]
    if "{" in rest or "}" in rest:
        raise ValueError(f"unmatched brace in {template!r}; write {{{{ or }}}} for a literal "
                         "brace")
    return out


def render(template: str, lookup: Callable[[str, str | None], str],
           quote: bool = False) -> str:
    """Replace placeholders with ``lookup(factor, name)``; quote each value for a shell if asked."""

    def sub(m: re.Match) -> str:
        if m.group(0) == "{{":
            return "{"
        if m.group(0) == "}}":
            return "}"
        factor, _, name = m.group(1).partition(".")
        value = lookup(factor, name or None)
        return shlex.quote(value) if quote else value

    return _PLACEHOLDER.sub(sub, template)


def level_lookup(levels: Mapping[str, str], values: Mapping[str, Mapping[str, str]]):
    """A lookup over a cell: ``levels`` factor → label, ``values`` factor → named values."""

    def lookup(factor: str, name: str | None) -> str:
        if name is None:
            return levels[factor]
        return values[factor][name]

    return lookup

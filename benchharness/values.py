"""One reading of the values people type: percentages, ratios and durations.

The command line and the experiment file read these values the same way, through
this module (see docs/cli.md, "Values"):

* a **percentage** (or fraction) is ``5%`` or ``0.05``; both mean five per cent. A
  bare number of 1 or more is refused with "did you mean 5%?", so no value can mean
  two things (``0.99`` is 99% and ``1`` would have been 1%, which is not monotone);
* a **ratio** is ``1.05``, ``1.05x`` (or ``1.05×``), or ``5%`` meaning a ratio of
  1.05, for options that give the size of a change (a tolerance, a ratio to detect).
  A bare number of 2 or more is refused (``5`` could be 5% or 5x), and a bare
  fraction below 1 (``0.05``), which such options once read as 5%, still is, with a
  deprecation note;
* a **duration** carries its unit: ``250ms``, ``90s``, ``5m``, ``1h``, or several
  from the largest to the smallest (``1h30m``, ``2m 30s``). A bare ``60`` is refused
  with "did you mean 60s?".

Each parser raises `ValueFormError` with a message that says what is wrong and what
would be right, without saying where; callers add the option name or the file
location. Deprecation notes (one line on stderr, each said once per process) go
through `deprecated`. Standard library only: ``benchharness --help`` and ``plan``
import this module.
"""

from __future__ import annotations

import math
import re
import sys

from benchharness.errors import BenchharnessError


class ValueFormError(BenchharnessError):
    """A typed value does not have the form its option or key needs."""


_NUMBER = r"[+-]?(?:\d+(?:\.\d*)?|\.\d+)(?:[eE][+-]?\d+)?"
_PERCENT = re.compile(rf"^({_NUMBER})\s*%$")
_BARE = re.compile(rf"^({_NUMBER})$")
_TIMES = re.compile(rf"^({_NUMBER})\s*[x×X]$")

_said: set[str] = set()


def deprecated(message: str) -> None:
    """Print ``note: MESSAGE`` on stderr once per process: an old spelling still works."""
    if message in _said:
        return
    _said.add(message)
    print(f"note: {message}", file=sys.stderr)


def _finite(text: str, number: str) -> float:
    v = float(number)
    if not math.isfinite(v):
        raise ValueFormError(f"{text!r} is not a finite number")
    return v


def _plain(v: float) -> str:
    """``5.0`` -> ``5``, ``2.5`` -> ``2.5``: a number as a person would type it."""
    return f"{v:g}"


def parse_percent(text) -> float:
    """``"5%"`` -> 0.05 and ``"0.05"`` -> 0.05; a bare number >= 1 is refused.

    Raises `ValueFormError` for anything else (with "did you mean 5%?" for a bare 5).
    """
    t = str(text).strip()
    m = _PERCENT.match(t)
    if m:
        return _finite(t, m.group(1)) / 100.0
    m = _BARE.match(t)
    if m:
        v = _finite(t, m.group(1))
        if abs(v) >= 1:
            raise ValueFormError(f"{t!r} is ambiguous as a percentage (a fraction is below 1); "
                                 f"did you mean {_plain(v)}%?")
        return v
    raise ValueFormError(f"{t!r} is not a percentage; write e.g. 5% (or the fraction 0.05)")


def parse_ratio(text, what: str = "a ratio") -> float:
    """A ratio from ``"1.05"``, ``"1.05x"``, ``"1.05×"`` or ``"5%"`` (= 1.05).

    ``what`` names the value in the deprecation note for a bare fraction.
    """
    t = str(text).strip()
    m = _PERCENT.match(t)
    if m:
        return 1.0 + _finite(t, m.group(1)) / 100.0
    m = _TIMES.match(t)
    if m:
        return _finite(t, m.group(1))
    m = _BARE.match(t)
    if m:
        v = _finite(t, m.group(1))
        if v >= 2:
            raise ValueFormError(f"{t!r} is ambiguous as a ratio; write {_plain(v)}% (a ratio "
                                 f"of {_plain(1 + v / 100)}) or {_plain(v)}x")
        if 0 < v < 1:
            deprecated(f"{what} {t!r} is read as {_plain(v * 100)}% (a ratio of "
                       f"{_plain(1 + v)}); a bare fraction there is deprecated: write "
                       f"{_plain(v * 100)}% or {_plain(1 + v)}x")
            return 1.0 + v
        return v
    raise ValueFormError(f"{t!r} is not a ratio; write e.g. 1.05x, 1.05 or 5% (a ratio of 1.05)")


def change_of(ratio: float) -> float:
    """The relative change a ratio stands for (1.05 -> 0.05), without the float residue
    of the subtraction (``1.05 - 1`` is 0.050000000000000044)."""
    return round(ratio - 1.0, 12)


_UNIT_S = {"ms": 0.001, "s": 1.0, "m": 60.0, "h": 3600.0}
_UNIT_RANK = {"h": 0, "m": 1, "s": 2, "ms": 3}
_DURATION_PART = re.compile(r"\s*(\d+(?:\.\d+)?|\.\d+)\s*(ms|h|m|s)(?![a-z])")


def parse_duration(text) -> float:
    """Seconds from ``"90s"``, ``"5m"``, ``"250ms"``, ``"1h30m"``, ``"2m 30s"``.

    Units are required (``60`` is refused with "did you mean 60s?"); several parts go
    from the largest unit to the smallest, each once.
    """
    t = str(text).strip()
    m = _BARE.match(t)
    if m:
        raise ValueFormError(f"{t!r} has no unit; did you mean {m.group(1)}s? (units: ms, s, "
                             "m, h, e.g. 90s, 5m, 1h30m)")
    total, pos, rank = 0.0, 0, -1
    while pos < len(t):
        part = _DURATION_PART.match(t, pos)
        if part is None or _UNIT_RANK[part.group(2)] <= rank:
            rank = -1
            break
        rank = _UNIT_RANK[part.group(2)]
        total += float(part.group(1)) * _UNIT_S[part.group(2)]
        pos = part.end()
    if rank < 0 or not math.isfinite(total):
        raise ValueFormError(f"{t!r} is not a duration; write a number with a unit, like 90s, "
                             "5m, 1h30m or 250ms")
    return total

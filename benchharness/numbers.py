"""How every number leaving benchharness is written: one formatter for all outputs.

Terminal, Markdown, HTML, JSON prose and JUnit text all call these functions, so a
ratio, an interval or a time reads the same wherever it appears (docs/cli.md,
"Numbers, units and verdict words"):

* a number: three significant figures, thousands separated by commas, scientific
  notation only below 0.0001 or from a million up (`fmt_num`);
* a ratio: ``1.23×`` — always the multiplication sign, never a letter x (`fmt_ratio`);
* an interval: ``LOW to HIGH`` with the unit on both ends: ``1.09× to 1.29×``,
  ``12.1 ms to 14.3 ms``, ``-0.32 to 0.15``; both ends share their decimals while they
  are within a factor of ten of each other, else each has three significant figures
  (`fmt_ratio_interval`, `fmt_interval`);
* a change: ``+3.4%`` / ``-12.0%`` (`fmt_change`), a share ``42.0%`` (`fmt_pct`);
* a p-value: ``0.012`` or ``< 0.001`` (`fmt_p`), in a sentence ``p = 0.012``,
  ``p < 0.001`` (`fmt_p_said`);
* a quantity always with its unit; a time in seconds is shown in s, ms, µs or ns and
  a memory size in bytes, KiB, MiB or GiB, chosen once per table column from the
  column's values (`pick_scale`), so a column never mixes µs and ms;
* a length of time: ``153 ms``, ``13.8 s``, ``2 min 5 s``, ``1 h 5 min`` (`fmt_duration`);
* a count with its noun: ``1 run``, ``3 runs`` (`plural`).

This module imports nothing beyond the standard library and belongs to no stage: the
analysis, the reports and the three decisions (gate, choose, history) all use it.
"""

from __future__ import annotations

import math
from typing import Iterable, NamedTuple

RATIO_SIGN = "×"
MISSING = "–"

#: seconds per unit of each time unit shown, largest first
_TIME = (("s", 1.0), ("ms", 1e-3), ("µs", 1e-6), ("ns", 1e-9))
#: bytes per unit of each memory unit shown, largest first
_MEMORY = (("GiB", 1024.0 ** 3), ("MiB", 1024.0 ** 2), ("KiB", 1024.0), ("bytes", 1.0))
_SPELLINGS = {"us": "µs", "μs": "µs", "sec": "s", "seconds": "s", "kib": "KiB", "mib": "MiB",
              "gib": "GiB", "b": "bytes", "byte": "bytes"}


def _finite(x) -> float | None:
    try:
        v = float(x)
    except (TypeError, ValueError):
        return None
    return v if math.isfinite(v) else None


# --------------------------------------------------------------------------- plain numbers

def _decimals(ax: float, digits: int) -> int:
    """Decimals giving ``ax`` ``digits`` significant figures (0.99996 -> 1.00, not 1.000)."""
    exp = int(math.floor(math.log10(ax)))
    if round(ax, max(0, digits - 1 - exp)) >= 10.0 ** (exp + 1):
        exp += 1
    return max(0, digits - 1 - exp)


def fmt_num(x, digits: int = 3) -> str:
    """A number with ``digits`` significant figures; '–' for missing, '∞' for infinite."""
    if x is None:
        return MISSING
    try:
        x = float(x)
    except (TypeError, ValueError):
        return str(x)
    if not math.isfinite(x):
        return MISSING if math.isnan(x) else ("∞" if x > 0 else "-∞")
    if x == 0:
        return "0"
    ax = abs(x)
    if ax >= 1e6 or ax < 1e-4:
        return f"{x:.{digits - 1}e}"
    return f"{x:,.{_decimals(ax, digits)}f}"


def _fixed(x: float, decimals: int) -> str:
    ax = abs(x)
    if ax >= 1e6 or (0 < ax < 1e-4):
        return f"{x:.2e}"
    return f"{x:,.{decimals}f}"


def _shared_decimals(values: Iterable[float], digits: int) -> int:
    """Decimals that give the smallest non-zero value ``digits`` significant figures."""
    small = [abs(v) for v in values if v]
    return _decimals(min(small), digits) if small else 0


#: ends of an interval further apart than this factor are each written on their own
SHARED_SPAN = 10.0


def _ends(a: float, b: float, digits: int, sign: str = "", unit: str = "") -> str:
    """``LOW to HIGH``: both ends with the decimals of the smaller one (``0.998× to
    1.010×``) while they are within a factor of ten of each other; further apart, each
    end with its own ``digits`` significant figures (``0.0181 to 1,130``, not
    ``0.0181 to 1,131.0171``, whose digits nothing measured)."""
    sfx = f"{sign}{unit}"
    sizes = [abs(v) for v in (a, b) if v]
    if sizes and max(sizes) / min(sizes) >= SHARED_SPAN:
        return f"{fmt_num(a, digits)}{sfx} to {fmt_num(b, digits)}{sfx}"
    d = _shared_decimals((a, b), digits)
    return f"{_fixed(a, d)}{sfx} to {_fixed(b, d)}{sfx}"


# --------------------------------------------------------------------------- ratios

def fmt_ratio(x, digits: int = 3) -> str:
    """A ratio: ``1.23×``, ``0.912×``, ``12.3×`` ('–' when missing)."""
    v = _finite(x)
    if v is None:
        return MISSING
    return f"{fmt_num(v, digits)}{RATIO_SIGN}"


def fmt_ratio_interval(lo, hi, digits: int = 3) -> str:
    """A ratio interval: ``1.09× to 1.29×``; both ends with the same decimals."""
    a, b = _finite(lo), _finite(hi)
    if a is None or b is None:
        return "no interval"
    if not (1e-4 <= min(abs(a), abs(b)) and max(abs(a), abs(b)) < 1e6):
        return f"{fmt_ratio(a, digits)} to {fmt_ratio(b, digits)}"
    return _ends(a, b, digits, sign=RATIO_SIGN)


def fmt_interval(lo, hi, unit: str = "", digits: int = 3) -> str:
    """Any other interval: ``12.1 ms to 14.3 ms`` or ``-0.32 to 0.15`` (unit on both ends)."""
    a, b = _finite(lo), _finite(hi)
    if a is None or b is None:
        return "no interval"
    return _ends(a, b, digits, unit=f" {unit}" if unit else "")


def fmt_change(ratio, decimals: int = 1) -> str:
    """The change a ratio means, as a signed percentage: 1.034 -> ``+3.4%``."""
    v = _finite(ratio)
    if v is None:
        return MISSING
    return f"{(v - 1) * 100:+.{decimals}f}%"


def fmt_pct(x, digits: int = 1) -> str:
    """A share given as a fraction: 0.05 -> ``5.0%``."""
    v = _finite(x)
    if v is None:
        return MISSING
    return f"{100 * v:.{digits}f}%"


def fmt_p(p) -> str:
    """A p-value: ``< 0.001`` below that, else three decimals."""
    v = _finite(p)
    if v is None:
        return MISSING
    if v < 0.001:
        return "< 0.001"
    return f"{v:.3f}"


def fmt_confidence(alpha) -> str:
    """The confidence of a ``1 - alpha`` statement: ``95%``, ``99.9%``, ``97.5%`` (never
    rounded to a whole number: 99.9% is not 100%)."""
    return f"{100 * (1 - float(alpha)):.6g}%"


def fmt_p_said(p) -> str:
    """A p-value in a sentence: ``p = 0.013``, ``p < 0.001``, ``p –`` when there is none."""
    if p is None:
        return f"p {MISSING}"
    text = fmt_p(p)
    return f"p {text}" if text.startswith("<") else f"p = {text}"


# --------------------------------------------------------------------------- units

def canonical_unit(unit: str | None) -> str:
    """The spelling we print for a unit name (``us`` -> ``µs``)."""
    u = str(unit or "").strip()
    return _SPELLINGS.get(u.lower(), u)


def _family(unit: str):
    for fam in (_TIME, _MEMORY):
        for name, size in fam:
            if name == unit:
                return fam, size
    return None, 1.0


class Scale(NamedTuple):
    """How to show values given in some unit: multiply by ``mult``, print ``unit``."""

    mult: float
    unit: str

    def fmt(self, x, digits: int = 3) -> str:
        v = _finite(x)
        if v is None:
            return MISSING
        text = fmt_num(v * self.mult, digits)
        return f"{text} {self.unit}" if self.unit else text

    def interval(self, lo, hi, digits: int = 3) -> str:
        a, b = _finite(lo), _finite(hi)
        if a is None or b is None:
            return "no interval"
        return fmt_interval(a * self.mult, b * self.mult, self.unit, digits)


def _time_unit(seconds: float) -> tuple[str, float]:
    """The time unit for a typical size in seconds: s from 0.1 s, ms from 100 µs,
    µs from 100 ns, else ns (so a column reads 12.5 ms rather than 0.0125 s)."""
    if seconds >= 0.1:
        return _TIME[0]
    if seconds >= 1e-4:
        return _TIME[1]
    if seconds >= 1e-7:
        return _TIME[2]
    return _TIME[3]


def _memory_unit(size_bytes: float) -> tuple[str, float]:
    for name, size in _MEMORY:
        if size_bytes >= size:
            return name, size
    return _MEMORY[-1]


def typical(values: Iterable) -> float | None:
    """The geometric middle of the smallest and largest non-zero size among ``values``."""
    sizes = [abs(v) for v in (_finite(x) for x in values) if v]
    if not sizes:
        return None
    return math.sqrt(min(sizes) * max(sizes))


def pick_scale(unit: str | None, values: Iterable = ()) -> Scale:
    """One display unit for a whole column of values given in ``unit``.

    Times (s, ms, µs, ns) and memory sizes (bytes, KiB, MiB, GiB) are rescaled to the
    unit that suits the column's typical size; any other unit is printed as given.
    """
    unit = canonical_unit(unit)
    fam, size = _family(unit)
    t = typical(values)
    if fam is None or t is None:
        return Scale(1.0, unit)
    base = t * size
    name, target = _time_unit(base) if fam is _TIME else _memory_unit(base)
    return Scale(size / target, name)


def fmt_quantity(x, unit: str | None, digits: int = 3) -> str:
    """One value with its unit, rescaled for its own size (``0.0125`` s -> ``12.5 ms``)."""
    return pick_scale(unit, [x]).fmt(x, digits)


def fmt_seconds(x, digits: int = 3) -> str:
    """A duration in seconds: ``12.5 ms``, ``1.20 s``."""
    return fmt_quantity(x, "s", digits)


def fmt_duration(x) -> str:
    """A length of time, as a person reads it: under a minute like every quantity
    (``153 ms``, ``13.8 s``), then whole minutes and seconds (``2 min 5 s``, ``30 min``),
    then hours and minutes (``1 h 5 min``)."""
    v = _finite(x)
    if v is None:
        return MISSING
    if abs(v) < 59.95:
        return fmt_seconds(v)
    total = int(round(v))
    if total < 3600:
        m, sec = divmod(total, 60)
        return f"{m} min {sec} s" if sec else f"{m} min"
    minutes = int(round(v / 60))
    h, m = divmod(minutes, 60)
    return f"{h:,} h {m} min" if m else f"{h:,} h"


# --------------------------------------------------------------------------- words

_IRREGULAR = {"series": "series", "child": "children", "datum": "data"}


def plural(n, noun: str, many: str | None = None) -> str:
    """``n`` and the noun in the right number: ``1 run``, ``3 runs``, ``0 runs``.

    Whole numbers are written with thousands separators (``1,200 runs``); ``many`` gives
    an irregular plural (``plural(2, "series", "series")``); a noun
    phrase pluralises its last word (``1 warm-up run``, ``2 warm-up runs``).
    """
    text = f"{n:,}" if isinstance(n, int) and not isinstance(n, bool) else str(n)
    return f"{text} {noun if n == 1 else (many or plural_word(noun))}"


def plural_word(noun: str) -> str:
    """The plural of a noun or of a phrase's last word."""
    head, _, last = noun.rpartition(" ")
    if last in _IRREGULAR:
        word = _IRREGULAR[last]
    elif last.endswith(("s", "x", "ch", "sh")):
        word = last + "es"
    elif last.endswith("y") and last[-2:-1] not in ("a", "e", "i", "o", "u"):
        word = last[:-1] + "ies"
    else:
        word = last + "s"
    return f"{head} {word}" if head else word

"""Units and number formatting shared by every report renderer.

Column names carry their unit as a suffix (DESIGN.md: ``wall_s``, ``max_rss_kib``).
This module reads that suffix back, gives a readable axis label, picks a display
scale (seconds shown as ms or µs when values are small) and formats numbers,
ratios and p-values in one consistent way for HTML, Markdown and the terminal.
"""

from __future__ import annotations

import math

# suffix -> (unit shown, family, factor to base unit of the family)
_SUFFIXES = {
    "_ns": ("ns", "time", 1e-9),
    "_us": ("µs", "time", 1e-6),
    "_ms": ("ms", "time", 1e-3),
    "_s": ("s", "time", 1.0),
    "_kib": ("KiB", "memory", 1024.0),
    "_mib": ("MiB", "memory", 1024.0 ** 2),
    "_gib": ("GiB", "memory", 1024.0 ** 3),
    "_bytes": ("bytes", "memory", 1.0),
    "_b": ("bytes", "memory", 1.0),
    "_pct": ("%", "share", 1.0),
    "_per_s": ("per s", "rate", 1.0),
    "_ops": ("operations", "count", 1.0),
}

_KNOWN = {
    "wall_s": "wall-clock time",
    "user_s": "user CPU time",
    "sys_s": "system CPU time",
    "max_rss_kib": "peak memory",
    "minor_faults": "minor page faults",
    "major_faults": "major page faults",
    "voluntary_switches": "voluntary context switches",
    "involuntary_switches": "involuntary context switches",
    "steady_s": "steady-state time per iteration",
}


#: Units declared outside the column name (custom metrics in ``metrics.json``).
DECLARED_UNITS: dict[str, str] = {}


def declare_unit(column: str, unit: str) -> None:
    """Record the unit of a custom metric column (from the results folder's metrics.json)."""
    if unit:
        DECLARED_UNITS[str(column)] = str(unit)


def unit_of(column: str) -> str:
    """The unit carried by a column name ('' when it carries none)."""
    if column in DECLARED_UNITS:
        return {"us": "µs"}.get(DECLARED_UNITS[column], DECLARED_UNITS[column])
    low = column.lower()
    for suffix in sorted(_SUFFIXES, key=len, reverse=True):
        if low.endswith(suffix):
            return _SUFFIXES[suffix][0]
    return ""


def describe(column: str) -> str:
    """A readable name for a response column."""
    return _KNOWN.get(column, column)


def display_scale(column: str, typical: float | None) -> tuple[float, str]:
    """(multiplier, unit) to show values of ``column`` whose typical size is ``typical``.

    Times in seconds below 0.1 s are shown in ms, below 100 µs in µs, so axis ticks
    read ``12.5`` rather than ``0.0125``.
    """
    unit = unit_of(column)
    if unit == "s" and typical is not None and math.isfinite(typical) and typical > 0:
        if typical < 1e-4:
            return 1e6, "µs"
        if typical < 0.1:
            return 1e3, "ms"
    return 1.0, unit


def axis_label(column: str, unit: str | None = None) -> str:
    """Axis label with the unit in parentheses."""
    unit = unit_of(column) if unit is None else unit
    name = describe(column)
    if name != column:
        name = f"{name} [{column}]"
    return f"{name} ({unit})" if unit else name


def fmt_num(x, digits: int = 3) -> str:
    """A number with ``digits`` significant figures; '–' for missing."""
    if x is None:
        return "–"
    try:
        x = float(x)
    except (TypeError, ValueError):
        return str(x)
    if not math.isfinite(x):
        return "–" if math.isnan(x) else ("∞" if x > 0 else "-∞")
    if x == 0:
        return "0"
    ax = abs(x)
    if ax >= 1e6 or ax < 1e-4:
        return f"{x:.{digits - 1}e}"
    decimals = max(0, digits - 1 - int(math.floor(math.log10(ax))))
    return f"{x:,.{decimals}f}"


def fmt_value(x, column: str) -> str:
    """A response value with its unit, seconds scaled to ms/µs when small."""
    if x is None or (isinstance(x, float) and math.isnan(x)):
        return "–"
    mult, unit = display_scale(column, abs(float(x)))
    text = fmt_num(float(x) * mult)
    return f"{text} {unit}" if unit else text


def fmt_ratio(x) -> str:
    """A ratio such as ``2.31×``."""
    if x is None:
        return "–"
    x = float(x)
    if not math.isfinite(x):
        return "–"
    return f"{fmt_num(x)}×"


def fmt_p(p) -> str:
    """A p-value: ``< 0.001`` below that, else three decimals (two significant if tiny)."""
    if p is None:
        return "–"
    p = float(p)
    if math.isnan(p):
        return "–"
    if p < 0.001:
        return "< 0.001"
    return f"{p:.3f}"


def fmt_pct(x, digits: int = 1) -> str:
    if x is None:
        return "–"
    x = float(x)
    if math.isnan(x):
        return "–"
    return f"{100 * x:.{digits}f}%"


def times_phrase(ratio: float) -> str:
    """Plain words for a ratio of a time: '2.3× as long' or '35% less time'."""
    if ratio >= 1:
        if ratio < 1.1:
            return f"{(ratio - 1) * 100:.1f}% more"
        return f"{fmt_num(ratio)}× as much"
    return f"{(1 - ratio) * 100:.1f}% less"

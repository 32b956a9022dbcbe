"""Units and number formatting shared by every report renderer.

Column names carry their unit as a suffix (DESIGN.md: ``wall_s``, ``max_rss_kib``).
This module reads that suffix back, gives a readable axis label and picks a display
scale (seconds shown as ms or µs when values are small); the numbers themselves are
written by `benchharness.numbers`, the one formatter of every output.
"""

from __future__ import annotations

import math

from benchharness.numbers import (  # noqa: F401  (re-exported: the renderers import them here)
    Scale, fmt_change, fmt_interval, fmt_num, fmt_p, fmt_pct, fmt_ratio, fmt_ratio_interval,
    pick_scale, plural,
)

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


def declare_folder_units(source) -> None:
    """Record the declared unit of every custom metric of a results folder (its
    ``metrics.json``), so tables and sentences print a metric's values in the unit the
    experiment file declared (``rows/s``), not bare or guessed from the name. A CSV or a
    folder without metrics declares nothing."""
    import os

    if source is None or not os.path.isdir(str(source)):
        return
    from benchharness.measure.metrics import read_manifest

    for column, info in read_manifest(source).items():
        if isinstance(info, dict) and info.get("unit"):
            declare_unit(column, str(info["unit"]))


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

    The same rule as every table column (`benchharness.numbers.pick_scale`): times in
    seconds below 0.1 s are shown in ms, below 100 µs in µs, so axis ticks read
    ``12.5`` rather than ``0.0125``.
    """
    if typical is None or not math.isfinite(typical) or typical <= 0:
        return 1.0, unit_of(column)
    return tuple(pick_scale(unit_of(column), [typical]))


def column_scale(column: str, values) -> Scale:
    """One display unit for a whole table column of ``column``'s values (never µs above
    ms above s); ``.fmt(x)`` writes one value, ``.interval(lo, hi)`` an interval."""
    return pick_scale(unit_of(column), values)


def axis_label(column: str, unit: str | None = None) -> str:
    """Axis label with the unit in parentheses."""
    unit = unit_of(column) if unit is None else unit
    name = describe(column)
    if name != column:
        name = f"{name} [{column}]"
    return f"{name} ({unit})" if unit else name


def fmt_value(x, column: str) -> str:
    """A response value with its unit, seconds scaled to ms/µs when small (a lone value;
    a table column uses `column_scale` so that all its rows share one unit)."""
    return pick_scale(unit_of(column), [x]).fmt(x)

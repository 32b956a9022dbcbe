"""The memory floor: the smallest peak resident size a run on this machine can record.

On Linux a child's ``ru_maxrss`` starts from the resident size of the address
space it was spawned from (the kernel carries the old address space's peak
into the new program at ``exec``). Runs are spawned by the launcher
(`benchharness.execute.launcher`), so a command smaller than the launcher
records the launcher's size, not its own. The launcher measures that floor
when it starts (it spawns a do-nothing program and reads its ``ru_maxrss``);
the runner stores it in ``session.json`` (`record`), ``runs.csv`` marks every
run whose ``max_rss_kib`` lies within `MARGIN` of it (`COLUMN`), and a report
whose response is ``max_rss_kib`` says how many runs sit there (`note`): for
those the figure bounds the command's memory from above and differences
between their cells say nothing about the command.
"""

from __future__ import annotations

from typing import Mapping

#: The runs.csv column: true when a run's ``max_rss_kib`` is at the floor.
COLUMN = "max_rss_at_floor"
#: A figure within this fraction above the floor counts as at the floor.
MARGIN = 0.10
#: session.json key of the floor measured when this session's launcher started.
SESSION_KEY = "memory_floor"


def record(session: dict, floor: Mapping | None) -> None:
    """Store an executor's measured floor (``Executor.memory_floor``: local runs
    measure one; simulated and cluster runs do not) in ``session`` (the
    ``session.json`` dict). A resumed session adds its own floor to
    ``resumed`` and keeps the first: nothing measured is overwritten."""
    if not isinstance(floor, Mapping) or not isinstance(floor.get("kib"), int):
        return
    entry = {"kib": int(floor["kib"]), "how": str(floor.get("how") or "")}
    have = session.get(SESSION_KEY)
    if isinstance(have, dict) and isinstance(have.get("kib"), int):
        have.setdefault("resumed", []).append(entry)
    else:
        session[SESSION_KEY] = entry


def floor_kib(session: Mapping | None) -> int | None:
    """The floor runs are compared with: the largest measured in the folder's
    sessions (a resumed session's launcher may be a little larger), or None."""
    have = (session or {}).get(SESSION_KEY)
    if not isinstance(have, Mapping):
        return None
    values = [have.get("kib")] + [r.get("kib") for r in have.get("resumed") or []
                                  if isinstance(r, Mapping)]
    values = [v for v in values if isinstance(v, int) and not isinstance(v, bool) and v > 0]
    return max(values) if values else None


def at_floor(max_rss_kib, floor: int | None) -> bool | None:
    """Whether a run's ``max_rss_kib`` lies within `MARGIN` of ``floor`` (None
    when either is unknown)."""
    if floor is None or max_rss_kib is None or isinstance(max_rss_kib, bool):
        return None
    try:
        value = float(max_rss_kib)
    except (TypeError, ValueError):
        return None
    if value != value:  # NaN: no figure
        return None
    return value <= floor * (1 + MARGIN)


def note(runs, session: Mapping | None, response: str) -> list[str]:
    """The report's note when the response is ``max_rss_kib`` and runs sit at
    the floor (none otherwise)."""
    floor = floor_kib(session)
    if response != "max_rss_kib" or floor is None or runs is None \
            or "max_rss_kib" not in getattr(runs, "columns", ()):
        return []
    import pandas as pd

    ok = runs if "status" not in runs.columns else runs[runs["status"].astype(str) == "ok"]
    values = pd.to_numeric(ok["max_rss_kib"], errors="coerce").dropna()
    if values.empty:
        return []
    n = int((values <= floor * (1 + MARGIN)).sum())
    if not n:
        return []
    share = "all" if n == len(values) else f"{n} of the {len(values)}"
    return [f"{share} ok runs recorded a max_rss_kib within {MARGIN:.0%} of the memory floor "
            f"measured for this session ({floor} KiB, the launcher's own size, which a "
            "program smaller than it inherits): for those runs the figure says only that the "
            "command used at most that much, so differences between their cells are not the "
            f"command's (runs.csv column {COLUMN})"]

"""Performance history across commits, and comparing two results folders.

`store` keeps per-cell summaries of results folders in an SQLite file; `trends`
and `changepoint` turn them into per-cell series with their steps (PELT,
Killick et al. 2012, with a permutation-calibrated penalty) and host breaks;
`compare` puts two folders side by side (cell x session model). See
docs/history.md.
"""

from pathlib import Path

#: the history file used when none is named
DEFAULT_DB = Path("results") / "history.sqlite"

__all__ = ["DEFAULT_DB", "add_results", "read_history"]


def __getattr__(name):  # lazy, so `benchharness --help` does not load sqlite3
    if name in ("add_results", "read_history"):
        from benchharness.history import store

        return getattr(store, name)
    raise AttributeError(name)

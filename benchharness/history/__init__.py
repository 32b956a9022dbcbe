"""Performance history across commits, and comparing two results folders.

`store` keeps per-cell summaries of results folders in an SQLite file; `trends`
and `changepoint` turn them into per-cell series with their steps (PELT,
Killick et al. 2012, with a permutation-calibrated penalty) and host breaks;
`compare` puts two folders side by side (cell x session model). See
docs/history.md.
"""

from benchharness.history.store import DEFAULT_DB, add_results, read_history

__all__ = ["DEFAULT_DB", "add_results", "read_history"]

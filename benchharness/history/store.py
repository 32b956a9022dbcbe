"""The performance history: an SQLite file of per-cell summaries across commits.

Owns: the schema (documented in docs/history.md), importing a results folder as
one transaction (all its rows or none), recognising a folder already imported
(its identity hash, see `folder.folder_identity`) so a second import adds
nothing, and reading series back. Only the standard library's ``sqlite3`` is
used; the file is meant to be kept as a CI artifact or cache.
"""

from __future__ import annotations

import json
import os
import sqlite3
from datetime import datetime, timezone
from pathlib import Path

from benchharness.errors import DataError, UsageError

SCHEMA_VERSION = 1

SCHEMA = """
CREATE TABLE IF NOT EXISTS folders (
    folder_id        TEXT PRIMARY KEY,   -- SHA-256 of experiment name, folder name, runs.jsonl
    folder_name      TEXT NOT NULL,
    folder_path      TEXT NOT NULL,      -- absolute path at import time (informational)
    experiment       TEXT NOT NULL,
    journal_size     INTEGER NOT NULL,   -- bytes of runs.jsonl hashed into folder_id
    commit_id        TEXT NOT NULL,
    commit_time      TEXT,               -- ISO 8601 committer time, NULL when unknown
    branch           TEXT,
    started_at       TEXT,               -- first run start in the folder (ISO 8601 UTC)
    host_fingerprint TEXT NOT NULL,      -- 16 hex digits, or 'unknown'
    host_facts       TEXT NOT NULL,      -- JSON: the identity facts that were hashed
    host_json        TEXT NOT NULL,      -- JSON: host.json as recorded
    imported_at      TEXT NOT NULL       -- ISO 8601 UTC
);
CREATE TABLE IF NOT EXISTS cells (
    folder_id   TEXT NOT NULL REFERENCES folders(folder_id),
    experiment  TEXT NOT NULL,
    cell        TEXT NOT NULL,           -- canonical JSON of the levels (keys sorted)
    cell_order  INTEGER NOT NULL,        -- position of the cell in the experiment's level order
    response    TEXT NOT NULL,           -- e.g. wall_s
    scale       TEXT NOT NULL CHECK (scale IN ('log', 'linear')),
    n           INTEGER NOT NULL,        -- timed runs with status ok
    center      REAL NOT NULL,           -- geometric mean (log) or arithmetic mean (linear)
    ci_low      REAL,                    -- confidence interval of center; NULL when n < 2
    ci_high     REAL,
    conf_level  REAL NOT NULL,
    mean        REAL NOT NULL,           -- mean of ln(response) (log) or of the response
    se          REAL,                    -- standard error of mean; NULL when n < 2
    noise_sd    REAL,                    -- SD of ln(response) (log) or of the response
    PRIMARY KEY (folder_id, cell, response)
);
CREATE INDEX IF NOT EXISTS cells_by_series ON cells (experiment, response, cell);
CREATE VIEW IF NOT EXISTS cell_history AS
    SELECT f.commit_id, f.commit_time, f.branch, c.experiment, c.cell, c.cell_order,
           c.response, c.scale,
           c.n, c.center, c.ci_low, c.ci_high, c.conf_level, c.mean, c.se, c.noise_sd,
           f.host_fingerprint, f.host_facts, f.folder_id, f.folder_name, f.started_at,
           f.imported_at
    FROM cells AS c JOIN folders AS f USING (folder_id);
"""


def connect(db_path: str | Path, create: bool = True) -> sqlite3.Connection:
    """Open (and create the schema of) a history file; autocommit mode, explicit BEGIN."""
    path = Path(db_path)
    if not create and not path.is_file():
        raise UsageError(f"{path}: no history file here; add results first with "
                         "`benchharness history add FOLDER`")
    if create:
        try:
            path.parent.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise UsageError(f"{path}: cannot create the history file's folder "
                             f"({exc.strerror or exc})") from None
    if path.is_dir():
        raise UsageError(f"{path}: is a folder; --history-db names the history file, e.g. "
                         f"{path / 'history.sqlite'}")
    try:
        conn = sqlite3.connect(str(path), isolation_level=None, timeout=30)
        conn.execute("PRAGMA foreign_keys = ON")
        version = conn.execute("PRAGMA user_version").fetchone()[0]
        if version > SCHEMA_VERSION:
            conn.close()
            raise DataError(f"{path}: history schema version {version} was written by a newer "
                            f"benchharness (this one reads version {SCHEMA_VERSION})")
        if version < SCHEMA_VERSION:
            conn.execute("BEGIN IMMEDIATE")
            for stmt in _statements(SCHEMA):
                conn.execute(stmt)
            conn.execute(f"PRAGMA user_version = {SCHEMA_VERSION}")
            conn.execute("COMMIT")
    except sqlite3.DatabaseError as exc:
        raise DataError(f"{path}: not a benchharness history file ({exc})") from None
    return conn


def _statements(script: str) -> list[str]:
    """Split the schema script into statements (executescript would commit implicitly)."""
    out, buf = [], []
    for line in script.splitlines():
        line = line.split("--", 1)[0].rstrip()
        if not line:
            continue
        buf.append(line)
        if line.endswith(";"):
            stmt = "\n".join(buf)
            if sqlite3.complete_statement(stmt):
                out.append(stmt)
                buf = []
    return out


def _insert_folder(conn: sqlite3.Connection, row: dict) -> None:
    conn.execute(
        "INSERT INTO folders (folder_id, folder_name, folder_path, experiment, journal_size, "
        "commit_id, commit_time, branch, started_at, host_fingerprint, host_facts, host_json, "
        "imported_at) VALUES (:folder_id, :folder_name, :folder_path, :experiment, "
        ":journal_size, :commit_id, :commit_time, :branch, :started_at, :host_fingerprint, "
        ":host_facts, :host_json, :imported_at)", row)


def _insert_cell(conn: sqlite3.Connection, row: dict) -> int:
    cur = conn.execute(
        "INSERT OR IGNORE INTO cells (folder_id, experiment, cell, cell_order, response, scale, "
        "n, center, ci_low, ci_high, conf_level, mean, se, noise_sd) VALUES (:folder_id, "
        ":experiment, :cell, :cell_order, :response, :scale, :n, :center, :ci_low, :ci_high, "
        ":conf_level, :mean, :se, :noise_sd)", row)
    return cur.rowcount


def _same_commit(recorded: str, given: str | None) -> bool:
    return given is None or recorded.startswith(given) or given.startswith(recorded)


def _selected(data, select):
    """(runs, factors) restricted to the ``select`` levels, those factors dropped."""
    if not select:
        return data.runs, data.factors
    runs = data.runs
    for f, level in select.items():
        if f not in data.factors:
            raise DataError(f"{data.path}: `{f}` is not a factor of this experiment "
                            f"(factors: {', '.join(data.factors)})")
        if level not in data.levels.get(f, []):
            raise DataError(f"{data.path}: `{level}` is not a level of `{f}` "
                            f"(levels: {', '.join(data.levels.get(f, []))})")
        runs = runs[runs[f].astype(str) == level]
    return runs, tuple(f for f in data.factors if f not in select)


def _record_id(identity: str, select) -> str:
    if not select:
        return identity
    import hashlib

    blob = json.dumps({str(k): str(v) for k, v in select.items()}, sort_keys=True)
    return hashlib.sha256(f"{identity}\0{blob}".encode("utf-8")).hexdigest()


def add_results(db_path: str | Path, folder: str | Path, commit: str | None = None,
                branch: str | None = None, responses=None, cwd: str | Path | None = None,
                conf_level: float = 0.95, select: dict | None = None) -> int:
    """Record a results folder in the history file; returns the number of cell rows written.

    The commit (and its time and branch) is read from git in ``cwd`` (default: the
    working directory) unless given. A folder already recorded adds nothing;
    recording it again under a different commit is refused. A folder whose
    journal has grown since it was recorded (a resumed run) replaces its earlier
    rows. All rows of one import are written in one transaction.

    ``select`` ({factor: level}) records only the runs at those levels, with
    those factors left out of the cells -- e.g. the candidate side of a folder
    that interleaved two builds, under the candidate's commit. Each selection
    of a folder is its own record.

    ``responses`` default: ``wall_s`` and, when the experiment file names another
    (``response: work_s``), that one too, so the figure its commands judge has a history.
    """
    from benchharness.history.cells import summarize_cells
    from benchharness.history.folder import read_folder

    data = read_folder(folder)
    runs, factors = _selected(data, select)
    record = _record_id(data.identity, select)
    if responses is None:
        from benchharness.experiment.response import folder_response

        declared = folder_response(data.path)
        responses = ("wall_s",) + ((declared,) if declared not in (None, "wall_s") else ())
    summaries = []
    for response in responses:
        summaries.extend(enumerate(summarize_cells(runs, factors, response,
                                                   conf_level, data.levels, data.path)))
    journal = data.path / "runs.jsonl"
    journal_bytes = journal.read_bytes() if journal.is_file() else b""
    created = not Path(db_path).exists()
    made_folder = not Path(db_path).parent.exists()
    conn = connect(db_path)
    added = None
    try:
        conn.execute("BEGIN IMMEDIATE")
        try:
            _record_folder(conn, data, record, select, journal_bytes, commit, branch, cwd)
            added = _insert_cells(conn, data, record, summaries)
            _record_units(conn, data, responses)
            conn.execute("COMMIT")
        except BaseException:
            added = None
            conn.execute("ROLLBACK")
            raise
        return added
    except sqlite3.DatabaseError as exc:
        if getattr(exc, "sqlite_errorcode", None) == getattr(sqlite3, "SQLITE_FULL", 13):
            from benchharness.errors import disk_full_writing

            raise disk_full_writing(db_path) from None  # exit 75, nothing added
        raise DataError(f"{db_path}: cannot write the history file ({exc})") from None
    finally:
        conn.close()
        if created and added is None:
            _remove_if_empty(db_path, made_folder)


def _remove_if_empty(db_path, made_folder: bool) -> None:
    """A history file this add created and then refused to fill (no commit given outside
    git, say) is removed, so a failed first add leaves no empty file behind for `history
    show` to read as "no rows match"; a file holding any folder is never touched."""
    try:
        conn = sqlite3.connect(str(db_path))
        try:
            empty = conn.execute("SELECT COUNT(*) FROM folders").fetchone()[0] == 0
        finally:
            conn.close()
        if empty:
            os.unlink(db_path)
            if made_folder:
                os.rmdir(Path(db_path).parent)   # only when empty; else OSError, kept
    except (sqlite3.DatabaseError, OSError):
        pass


def _record_folder(conn, data, record: str, select, journal_bytes: bytes, commit, branch,
                   cwd) -> None:
    """The folder's row, inside the caller's transaction: nothing when it is recorded already
    (under the same commit, else refused); the earlier rows of the same folder before it was
    resumed replaced (keeping their commit); else a new row under the commit resolved."""
    from benchharness.history.fingerprint import host_facts, host_fingerprint
    from benchharness.history.gitinfo import CommitInfo, resolve_commit

    existing = conn.execute("SELECT commit_id FROM folders WHERE folder_id = ?",
                            (record,)).fetchone()
    if existing is not None:
        if not _same_commit(existing[0], commit):
            raise DataError(f"{data.path}: this results folder is already recorded as "
                            f"commit {existing[0]}; a folder measures one commit")
        return
    earlier = _earlier_record(conn, data, select, journal_bytes)
    if earlier is not None:
        # the same folder, resumed since: its new summaries replace the old
        if not _same_commit(earlier[2], commit):
            raise DataError(f"{data.path}: this results folder is already "
                            f"recorded as commit {earlier[2]}; a folder measures "
                            "one commit")
        info = CommitInfo(earlier[2], earlier[3], branch or earlier[4])
        conn.execute("DELETE FROM cells WHERE folder_id = ?", (earlier[0],))
        conn.execute("DELETE FROM folders WHERE folder_id = ?", (earlier[0],))
    else:
        info = resolve_commit(commit, branch, cwd)
    _insert_folder(conn, {
        "folder_id": record, "folder_name": data.name,
        "folder_path": str(data.path.resolve()), "experiment": data.experiment,
        "journal_size": len(journal_bytes),
        "commit_id": info.commit, "commit_time": info.commit_time,
        "branch": info.branch, "started_at": data.first_started_at,
        "host_fingerprint": host_fingerprint(data.host),
        "host_facts": json.dumps(host_facts(data.host), sort_keys=True),
        "host_json": json.dumps(data.host, sort_keys=True, default=str),
        "imported_at": datetime.now(timezone.utc).isoformat(timespec="seconds"),
    })


def _earlier_record(conn, data, select, journal_bytes: bytes):
    """The row (folder_id, journal_size, commit_id, commit_time, branch) recording this
    folder when its journal was shorter (a run resumed since), or None."""
    from benchharness.history.folder import folder_identity

    for row in conn.execute(
            "SELECT folder_id, journal_size, commit_id, commit_time, branch "
            "FROM folders WHERE experiment = ? AND folder_name = ? AND "
            "journal_size < ?", (data.experiment, data.name, len(journal_bytes))):
        if _record_id(folder_identity(data.experiment, data.name,
                                      journal_bytes[:row[1]]), select) == row[0]:
            return row
    return None


def _insert_cells(conn, data, record: str, summaries) -> int:
    """The cell rows of the folder's summaries; the number written."""
    added = 0
    for order, s in summaries:
        added += _insert_cell(conn, {
            "folder_id": record, "experiment": data.experiment, "cell": s.key,
            "cell_order": order,
            "response": s.response, "scale": s.scale, "n": s.n, "center": s.center,
            "ci_low": s.ci_low, "ci_high": s.ci_high, "conf_level": s.conf_level,
            "mean": s.mean, "se": s.se, "noise_sd": s.noise_sd,
        })
    return added


#: the unit a custom metric declares (its results folder's metrics.json), per experiment;
#: created when first needed, so history files written before it read the same
_UNITS_TABLE = ("CREATE TABLE IF NOT EXISTS units (experiment TEXT NOT NULL, "
                "response TEXT NOT NULL, unit TEXT NOT NULL, PRIMARY KEY (experiment, response))")


def _record_units(conn, data, responses) -> None:
    """Keep the declared unit of each recorded metric, so `history show` prints its values
    as declared (``rows/s``) once the results folder is gone."""
    from benchharness.measure.metrics import read_manifest

    manifest = read_manifest(data.path)
    for response in responses:
        info = manifest.get(response)
        if isinstance(info, dict) and info.get("unit"):
            conn.execute(_UNITS_TABLE)
            conn.execute("INSERT OR REPLACE INTO units (experiment, response, unit) "
                         "VALUES (?, ?, ?)", (data.experiment, response, str(info["unit"])))


def read_units(db_path: str | Path) -> dict[tuple[str, str], str]:
    """{(experiment, response): unit} of the metrics recorded with a declared unit."""
    conn = connect(db_path, create=False)
    try:
        rows = conn.execute("SELECT experiment, response, unit FROM units").fetchall()
    except sqlite3.OperationalError:   # no metric with a unit recorded yet
        rows = []
    except sqlite3.DatabaseError as exc:
        raise DataError(f"{db_path}: cannot read the history file ({exc})") from None
    finally:
        conn.close()
    return {(e, r): u for e, r, u in rows}


def read_history(db_path: str | Path, experiment: str | None = None,
                 response: str | None = "wall_s", cell_filter: dict | None = None):
    """Rows of ``cell_history`` as a DataFrame, oldest first.

    Order: cells as the experiment lists its levels; within a cell, commit time
    when known, else the folder's first run start, then import order. ``cell_filter`` keeps cells whose levels include every ``factor: level``.
    """
    import pandas as pd

    conn = connect(db_path, create=False)
    try:
        sql = "SELECT * FROM cell_history WHERE 1=1"
        params: list = []
        if experiment is not None:
            sql += " AND experiment = ?"
            params.append(experiment)
        if response is not None:
            sql += " AND response = ?"
            params.append(response)
        df = pd.read_sql_query(sql, conn, params=params)
    except sqlite3.DatabaseError as exc:
        raise DataError(f"{db_path}: cannot read the history file ({exc})") from None
    finally:
        conn.close()
    if cell_filter:
        def keep(cell_json: str) -> bool:
            levels = json.loads(cell_json)
            return all(levels.get(k) == v for k, v in cell_filter.items())
        df = df[df["cell"].map(keep)]
    # one time unit for both columns, so that one fills the other's gaps without a cast
    when = pd.to_datetime(df["commit_time"], utc=True, errors="coerce",
                          format="ISO8601").dt.as_unit("us")
    started = pd.to_datetime(df["started_at"], utc=True, errors="coerce",
                             format="ISO8601").dt.as_unit("us")
    first_rank = df.groupby(["experiment", "response", "cell"])["cell_order"].transform("min")
    df = df.assign(_order=when.fillna(started), _started=started, _rank=first_rank)
    df = df.sort_values(["experiment", "response", "_rank", "cell", "_order", "_started",
                         "imported_at"], kind="stable", na_position="last")
    return df.drop(columns=["_order", "_started", "_rank"]).reset_index(drop=True)


def parse_cell_filter(text: str | None, option: str = "--cell") -> dict | None:
    """``k=v,k2=v2`` -> dict; UsageError naming the bad part otherwise."""
    if not text:
        return None
    out = {}
    for part in text.split(","):
        if "=" not in part:
            raise UsageError(f"{option} {text!r}: `{part}` is not factor=level; "
                             f"write e.g. {option} codec=zlib,level=6")
        k, v = part.split("=", 1)
        if not k.strip():
            raise UsageError(f"{option} {text!r}: empty factor name in `{part}`")
        out[k.strip()] = v.strip()
    return out

"""Reading a results folder for the history and compare commands.

Owns: turning a results folder (DESIGN.md contract: ``experiment.yaml``,
``runs.csv``, ``runs.jsonl``, ``host.json``) into plain data -- the factor names,
the timed runs as a DataFrame with factor columns as exact strings, the host
facts -- and the folder's identity, a SHA-256 over the experiment name, the
folder name and the journal bytes, so importing the same folder twice can be
recognised.

The files are read with the foundation's ``benchharness.results.journal.load_results``
(runs from the journal, so an interrupted folder reads too).
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from benchharness.errors import ResultsFolderError



@dataclass(frozen=True)
class FolderData:
    """What the history needs from one results folder."""

    path: Path
    name: str                      # folder name (last path component)
    experiment: str                # experiment name from experiment.yaml
    factors: tuple[str, ...]       # factor names in experiment order
    runs: Any                      # pandas DataFrame of runs.csv (factor columns as str)
    host: dict = field(default_factory=dict)
    identity: str = ""             # hex SHA-256, see module docstring
    first_started_at: str | None = None
    levels: dict = field(default_factory=dict)   # factor -> level labels in listed order


def folder_identity(experiment: str, folder_name: str, journal_bytes: bytes) -> str:
    h = hashlib.sha256()
    h.update(experiment.encode("utf-8"))
    h.update(b"\0")
    h.update(folder_name.encode("utf-8"))
    h.update(b"\0")
    h.update(journal_bytes)
    return h.hexdigest()


def read_folder(folder: str | Path) -> FolderData:
    """Read a results folder; raise ResultsFolderError with one clear line if it is not one."""
    from benchharness.results.journal import load_results

    path = Path(folder)
    if not path.is_dir():
        raise ResultsFolderError(f"{path}: not a results folder (no such directory)")
    res = load_results(path)
    factors = tuple(res.experiment.factor_names)
    runs = res.runs.copy()
    for f in factors:
        runs[f] = runs[f].astype(object).astype(str)
    journal = path / "runs.jsonl"
    journal_bytes = journal.read_bytes() if journal.is_file() else b""
    first = None
    if "started_at" in runs.columns:
        started = runs["started_at"].dropna().astype(str)
        started = started[started != ""]
        if len(started):
            first = min(started)
    name = path.resolve().name
    return FolderData(path=path, name=name, experiment=res.experiment.name, factors=factors,
                      runs=runs, host=dict(res.host or {}),
                      identity=folder_identity(res.experiment.name, name, journal_bytes),
                      first_started_at=first,
                      levels={f: list(res.experiment.levels_of(f)) for f in factors})

"""Reading a results folder for the history and compare commands.

Owns: turning a results folder (DESIGN.md contract: ``experiment.yaml``,
``runs.csv``, ``runs.jsonl``, ``host.json``) into plain data -- the factor names,
the timed runs as a DataFrame with factor columns as exact strings, the host
facts -- and the folder's identity, a SHA-256 over the experiment name, the
folder name and the journal bytes, so importing the same folder twice can be
recognised.

When the foundation's ``benchharness.journal.load_results`` is available it is
used; otherwise the files are read directly per the contract.
"""

from __future__ import annotations

import hashlib
import json
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from benchharness.errors import ResultsFolderError

#: runs.csv columns fixed by the contract; everything else is a factor, a later
#: column or a custom metric.
FIXED_COLUMNS = (
    "run", "position", "block", "replicate", "status", "exit_code", "wall_s", "user_s",
    "sys_s", "max_rss_kib", "minor_faults", "major_faults", "voluntary_switches",
    "involuntary_switches", "in_blocks", "out_blocks", "started_at", "message",
)


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


def _factor_names_from_yaml(path: Path) -> tuple[str, tuple[str, ...]]:
    import yaml

    try:
        text = path.read_text(encoding="utf-8")
        root = yaml.compose(text)
    except (OSError, yaml.YAMLError) as exc:
        raise ResultsFolderError(f"{path}: cannot read the experiment file: {exc}") from None
    if not isinstance(root, yaml.MappingNode):
        raise ResultsFolderError(f"{path}: the experiment file is not a mapping")
    name = None
    factors: list[str] = []
    for key, value in root.value:
        if key.value == "experiment" and isinstance(value, yaml.ScalarNode):
            name = value.value
        elif key.value == "factors" and isinstance(value, yaml.MappingNode):
            factors = [str(k.value) for k, _ in value.value]
    if not name:
        raise ResultsFolderError(f"{path}: no `experiment:` name; the frozen experiment file "
                                 "must name the experiment")
    if not factors:
        raise ResultsFolderError(f"{path}: no `factors:` mapping; expected factor names as keys")
    return name, tuple(factors)


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
    import pandas as pd

    path = Path(folder)
    if not path.is_dir():
        raise ResultsFolderError(f"{path}: not a results folder (no such directory)")
    exp_file = path / "experiment.yaml"
    csv_file = path / "runs.csv"
    if not exp_file.is_file():
        raise ResultsFolderError(f"{path}: not a results folder (experiment.yaml is missing)")
    if not csv_file.is_file():
        raise ResultsFolderError(f"{path}: runs.csv is missing; a results folder needs its "
                                 "tidy export of the journal")
    name, factors = _factor_names_from_yaml(exp_file)
    try:
        runs = pd.read_csv(csv_file, dtype={f: str for f in factors}, keep_default_na=False,
                           na_values={c: [""] for c in FIXED_COLUMNS if c not in factors})
    except (OSError, ValueError, pd.errors.ParserError) as exc:
        raise ResultsFolderError(f"{csv_file}: cannot read: {exc}") from None
    missing = [c for c in ("status", *factors) if c not in runs.columns]
    if missing:
        raise ResultsFolderError(f"{csv_file}: missing column(s) {', '.join(missing)}; "
                                 "expected one column per factor and a status column")
    host: dict = {}
    host_file = path / "host.json"
    if host_file.is_file():
        try:
            host = json.loads(host_file.read_text(encoding="utf-8"))
        except (OSError, ValueError) as exc:
            raise ResultsFolderError(f"{host_file}: cannot read: {exc}") from None
        if not isinstance(host, dict):
            raise ResultsFolderError(f"{host_file}: expected a JSON object of machine facts")
    journal = path / "runs.jsonl"
    journal_bytes = journal.read_bytes() if journal.is_file() else csv_file.read_bytes()
    first = None
    if "started_at" in runs.columns:
        started = runs["started_at"].dropna().astype(str)
        started = started[started != ""]
        if len(started):
            first = min(started)
    return FolderData(path=path, name=path.resolve().name, experiment=name, factors=factors,
                      runs=runs, host=host,
                      identity=folder_identity(name, path.resolve().name, journal_bytes),
                      first_started_at=first)

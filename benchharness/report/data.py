"""Everything one report needs, gathered into one plain object (`ReportData`).

Renderers (figures, HTML, Markdown, terminal) read only `ReportData`; this module
is the edge that reads a results folder or a tidy CSV, takes (or computes) the
analysis, and derives the per-run residuals and the Box-Cox profile for the
diagnostic figures (see `benchharness.report.model`).
"""

from __future__ import annotations

import json
import math
import shlex
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Mapping

from benchharness.errors import DataError


@dataclass(frozen=True)
class ReportData:
    """The inputs of one report, as plain data."""

    name: str
    about: str
    response: str
    factors: tuple[str, ...]
    levels: Mapping[str, tuple[str, ...]]
    analysis: Mapping[str, Any]
    runs: Any                       # DataFrame: every run (all statuses), runs.csv columns
    residuals: Any = None           # DataFrame: run, position, <factors>, fitted, residual
    profile: Any = None             # DataFrame: lambda, loglik (Box-Cox profile)
    design: Mapping[str, Any] = field(default_factory=dict)
    host: Mapping[str, Any] = field(default_factory=dict)
    folder: Path | None = None
    source: str = ""
    reproduce: str | None = None
    block: str | None = None
    # Sections contributed by other capabilities: {id, title, summary, columns, rows, notes}
    extra: tuple = ()
    extra_notes: tuple = ()
    better: str | None = None       # "lower" | "higher" when the metric declares it

    @property
    def alpha(self) -> float:
        a = self.analysis.get("alpha")
        if a is None:
            a = (self.analysis.get("model") or {}).get("alpha")
        try:
            return float(a) if a is not None else 0.05
        except (TypeError, ValueError):
            return 0.05

    @property
    def ok_runs(self):
        runs = self.runs
        if "status" in runs.columns:
            runs = runs[runs["status"].astype(str) == "ok"]
        return runs

    @property
    def timed_runs(self):
        """Runs that were timed (every status except untimed warm-up)."""
        runs = self.runs
        if "status" in runs.columns:
            runs = runs[runs["status"].astype(str) != "warmup"]
        return runs


def _as_dict(analysis) -> dict:
    if analysis is None:
        return {}
    if isinstance(analysis, Mapping):
        return dict(analysis)
    if hasattr(analysis, "to_dict"):
        return analysis.to_dict()
    raise DataError(f"cannot use {type(analysis).__name__} as an analysis")


def _jsonable(d: dict) -> dict:
    """Round-trip through JSON so every renderer sees exactly analysis.json."""
    return json.loads(json.dumps(d, default=_json_default, allow_nan=True))


def _json_default(o):
    try:
        import numpy as np

        if isinstance(o, np.generic):
            return o.item()
        if isinstance(o, np.ndarray):
            return o.tolist()
    except ImportError:  # pragma: no cover
        pass
    return str(o)


def _levels_from(runs, factors, experiment, adict=None) -> dict[str, tuple[str, ...]]:
    levels: dict[str, tuple[str, ...]] = {}
    analysed = {}
    for f in (adict or {}).get("factors") or []:
        if isinstance(f, Mapping) and f.get("levels"):
            analysed[str(f.get("name"))] = tuple(str(x) for x in f["levels"])
    for f in factors:
        listed = analysed.get(f)
        if experiment is not None and listed is None:
            try:
                listed = tuple(experiment.levels_of(f))
            except KeyError:  # a CSV factor the experiment does not declare
                listed = None
        seen = [str(v) for v in runs[f].dropna().astype(str).unique()]
        if listed:
            extra = [v for v in seen if v not in listed]
            levels[f] = tuple(listed) + tuple(extra)
        else:
            levels[f] = tuple(seen)
    return levels


def _read_folder(folder: Path):
    """(runs DataFrame, Experiment, host dict, session dict) of a results folder."""
    from benchharness.results.journal import load_results

    res = load_results(folder)
    return res.runs, res.experiment, dict(res.host or {}), dict(getattr(res, "session", {}) or {})


def _design_of(experiment, runs, factors, levels) -> dict:
    import numpy as np

    d: dict[str, Any] = {}
    status = runs["status"].astype(str) if "status" in runs.columns else None
    if status is not None:
        d["runs_total"] = int((status != "warmup").sum())
        for s in ("ok", "failed", "timeout", "warmup"):
            d[f"runs_{s}"] = int((status == s).sum())
    else:
        d["runs_total"] = d["runs_ok"] = len(runs)
        d["runs_failed"] = d["runs_timeout"] = d["runs_warmup"] = 0
    timed = runs if status is None else runs[status != "warmup"]
    if factors:
        d["cells_planned"] = int(np.prod([len(levels[f]) for f in factors]))
        d["cells_observed"] = int(timed.groupby(list(factors), observed=True).ngroups)
    if "replicate" in timed.columns and len(timed):
        d["replicates_seen"] = int(timed["replicate"].nunique())
    if experiment is not None:
        d["replicates"] = getattr(experiment, "replicates", None)
        d["warmup"] = getattr(experiment, "warmup", None)
        d["order"] = getattr(experiment, "order", None)
        d["seed"] = getattr(experiment, "seed", None)
        d["timeout_s"] = getattr(experiment, "timeout_s", None)
        cmd = getattr(experiment, "command", None)
        if callable(getattr(cmd, "text", None)):
            d["command"] = str(cmd.text())
        elif isinstance(cmd, (list, tuple)):
            d["command"] = " ".join(shlex.quote(str(c)) for c in cmd)
        elif cmd is not None:
            d["command"] = str(cmd)
    return d


def _reproduce_command(folder: Path | None, experiment, seed, session=None) -> str | None:
    """The command that runs the same experiment again in the same order."""
    if folder is None or experiment is None:
        return None
    argv = list((session or {}).get("argv") or [])
    if (session or {}).get("gate") and len(argv) > 1 and argv[1] == "gate":
        # The gate's own command line, without --out (a new folder each time) and with
        # the seed it used, so the blocks come in the same order.
        parts, skip = ["benchharness"], False
        for a in argv[1:]:
            if skip:
                skip = False
                continue
            if a in ("--out", "--seed"):
                skip = True
                continue
            if a.startswith("--out=") or a.startswith("--seed="):
                continue
            parts.append(str(a))
        if seed is not None:
            parts += ["--seed", str(seed)]
        return " ".join(shlex.quote(p) for p in parts)
    original = (session or {}).get("experiment_path")
    target = original if original and original != "<string>" else str(folder / "experiment.yaml")
    parts = ["benchharness", "run", str(target)]
    if seed is not None:
        parts += ["--seed", str(seed)]
    return " ".join(shlex.quote(p) for p in parts)


def _seed_used(session: dict, experiment) -> int | None:
    """The seed that ordered the runs: recorded by the runner, else the experiment's."""
    seed = session.get("seed") if session else None
    if seed is None and experiment is not None:
        seed = getattr(experiment, "seed", None)
    return seed


def collect(source, *, analysis=None, response: str | None = None,
            factors: list[str] | None = None, block: str | None = None,
            compute_analysis: bool = True, **analyze_kwargs) -> ReportData:
    """Gather a `ReportData` from a results folder, a CSV path or a DataFrame.

    ``analysis`` may be an `Analysis` object or an analysis.json dict; without it,
    a results folder's ``analysis.json`` is used when it answers the same question
    (same response and factors), else the analysis is computed.
    """
    import pandas as pd

    experiment = None
    host: dict = {}
    session: dict = {}
    folder: Path | None = None
    if isinstance(source, pd.DataFrame):
        runs = source
        src_text = "<table>"
    else:
        path = Path(source)
        src_text = str(path)
        if path.is_dir():
            folder = path
            runs, experiment, host, session = _read_folder(path)
        else:
            from benchharness.results.source import load_table

            runs, experiment = load_table(path, factors=factors)

    if factors is None:
        if experiment is not None:
            factors = list(experiment.factor_names)
        elif analysis is not None:
            factors = _factor_names(_as_dict(analysis))
        if not factors:
            raise DataError(f"{src_text}: name the factors (--factors A,B,...)")
    factors = list(factors)
    missing = [f for f in factors if f not in runs.columns]
    if missing:
        raise DataError(f"{src_text}: no column named {missing[0]!r} "
                        f"(columns: {', '.join(map(str, runs.columns))})")
    raw_runs = runs
    user_block = block
    runs = runs.copy()
    for f in factors:
        runs[f] = runs[f].astype(str)

    if block is None:
        if experiment is not None and getattr(experiment, "order", None) == "blocked" \
                and "block" in runs.columns:
            block = "block"
        elif "host" in runs.columns and runs["host"].nunique(dropna=True) > 1:
            block = "host"

    obj = analysis
    adict = _as_dict(analysis) if analysis is not None else None
    if adict is None and folder is not None and (folder / "analysis.json").exists():
        stored = json.loads((folder / "analysis.json").read_text())
        same_resp = response is None or stored.get("response") == response
        same_fac = stored.get("factors") is None or _factor_names(stored) == factors
        if same_resp and same_fac:
            adict = stored
    if adict is None and nothing_finished(runs, response or "wall_s"):
        # Every timed run failed or timed out: a report of the design and of why the runs
        # did not finish is still worth reading; there is just nothing to analyse.
        adict = unanalysed(runs, response or "wall_s", factors)
    if adict is None:
        if not compute_analysis:
            raise DataError(f"{src_text}: no analysis to report")
        from benchharness import analyze

        target = raw_runs if isinstance(source, pd.DataFrame) else Path(source)
        obj = analyze(target, response=response or "wall_s", factors=factors,
                      block=user_block, **analyze_kwargs)
        adict = _as_dict(obj)
    adict = _jsonable(adict)
    response = adict.get("response") or response or "wall_s"
    if response not in runs.columns:
        raise DataError(f"{src_text}: no response column {response!r}")

    # The block the analysis actually used, read from its ANOVA rows.
    terms = {r.get("term") for r in adict.get("anova") or []}
    if adict.get("block") and adict["block"] in runs.columns:
        block = adict["block"]
    if block is not None and block not in terms:
        block = None
    if block is None:
        for cand in ("block", "host"):
            if cand in terms and cand in runs.columns and cand not in factors:
                block = cand

    levels = _levels_from(runs, factors, experiment, adict)

    residuals = None
    if obj is not None and not isinstance(obj, Mapping):
        residuals = _residuals_of(obj, runs, factors)
    profile = (adict.get("transform") or {}).get("profile")
    from benchharness.report import model

    residuals = _normalise_residuals(residuals)
    if residuals is None and not adict.get("unanalysed"):
        try:
            residuals = model.residual_table(runs, adict, factors, block)
        except (KeyError, ValueError) as exc:  # e.g. a response with no usable values
            raise DataError(f"{src_text}: cannot compute residuals: {exc}") from exc
    # A fine profile of our own (cheap: one projection per λ); the analysis' coarse
    # grid is the fallback.
    stored = _normalise_profile(profile)
    fine = None
    if not adict.get("unanalysed") and (stored is None or len(runs) <= 50_000):
        # (above 50,000 rows: the analysis' own grid)
        fine = model.boxcox_profile(runs, adict, factors, block)
    profile = fine if fine is not None else stored

    design = _design_of(experiment, runs, factors, levels)
    seed = _seed_used(session, experiment)
    design["seed"] = seed
    if session.get("cwd"):
        design["run_from"] = session["cwd"]
    if session.get("benchharness_version"):
        design["version"] = session["benchharness_version"]
    extra, extra_notes = _extra_sections(folder, experiment)
    from benchharness.measure.floor import note as floor_note

    extra_notes += floor_note(runs, session, response)  # peak memory at the launcher's size
    better = _declared_metric(folder, response)
    name = getattr(experiment, "name", None) or (
        folder.name if folder else "experiment" if src_text == "<table>" else Path(src_text).stem)
    about = getattr(experiment, "about", None) or ""
    return ReportData(
        name=str(name), about=str(about), response=response, factors=tuple(factors),
        levels=levels, analysis=adict, runs=runs, residuals=residuals, profile=profile,
        design=design, host=host, folder=folder, source=src_text,
        reproduce=_reproduce_command(folder, experiment, seed, session), block=block,
        extra=tuple(extra), extra_notes=tuple(extra_notes), better=better,
    )


def nothing_finished(runs, response: str) -> bool:
    """True when the table records run statuses and no timed run finished with a value."""
    import pandas as pd

    if "status" not in runs.columns:
        return False
    status = runs["status"].astype(str)
    timed = status != "warmup"
    if not timed.any():
        return False
    ok = status == "ok"
    if response in runs.columns:
        ok &= pd.to_numeric(runs[response], errors="coerce").notna()
    return not bool(ok.any())


def unanalysed(runs, response: str, factors) -> dict:
    """The analysis dict of a table where no timed run finished: counts and a note only."""
    status = runs["status"].astype(str)
    timed = runs[status != "warmup"]
    n = len(timed)
    failed = int((timed["status"].astype(str) == "failed").sum())
    timeout = int((timed["status"].astype(str) == "timeout").sum())
    parts = [f"{failed} failed" if failed else "", f"{timeout} timed out" if timeout else ""]
    other = n - failed - timeout
    if other:
        parts.append(f"{other} finished without a {response} value")
    why = ", ".join(p for p in parts if p)
    note = (f"none of the {n} timed runs finished with a {response} value ({why}), so there "
            "is nothing to analyse; the data-quality warnings give the reasons the runs report")
    return {"response": response, "unanalysed": note, "notes": [note],
            "factors": [{"name": f, "levels": [str(v) for v in
                                              timed[f].dropna().astype(str).unique()]}
                        for f in factors],
            "transform": {}, "anova": [], "means": [], "effects": [], "comparisons": [],
            "diagnostics": {}, "failures": {"runs": n, "not_ok": n}}


def _declared_metric(folder, response) -> str | None:
    """Direction (and unit) of a custom metric from the folder's metrics.json."""
    if folder is None or not (folder / "metrics.json").exists():
        return None
    try:
        info = json.loads((folder / "metrics.json").read_text()).get(response)
    except (ValueError, AttributeError):
        return None
    if not isinstance(info, Mapping):
        return None
    from benchharness.report.units import declare_unit

    declare_unit(response, str(info.get("unit") or ""))
    better = info.get("better")
    return better if better in ("lower", "higher") else None


def _extra_sections(folder, experiment):
    """Sections of later capabilities that the experiment file asks for.

    `choose:` -> "Choosing a default" (benchharness.choose.choice_section). A section
    that cannot be computed becomes a one-line note instead.
    """
    from benchharness.errors import BenchharnessError

    sections, notes = [], []
    wanted = getattr(experiment, "sections", None) or {}
    if folder is not None and "choose" in wanted:
        try:
            from benchharness.choose import choice_section
        except ImportError:
            choice_section = None
        if choice_section is not None:
            try:
                sec = dict(choice_section(folder))
                sec.setdefault("id", "choose")
                sections.append(sec)
            except BenchharnessError as exc:
                notes.append(f"No default could be chosen: {exc}")
    return sections, notes


def _factor_names(adict: Mapping) -> list[str]:
    """Factor names of an analysis dict (entries are names or {name, levels})."""
    out = []
    for f in adict.get("factors") or []:
        out.append(str(f.get("name")) if isinstance(f, Mapping) else str(f))
    return out


def _residuals_of(obj, runs, factors):
    """Per-run residual table from an `Analysis` object's arrays, levels joined by run id."""
    import numpy as np
    import pandas as pd

    res = getattr(obj, "residuals", None)
    fit = getattr(obj, "fitted", None)
    pos = getattr(obj, "position", None)
    run = getattr(obj, "run", None)
    if res is None or fit is None or run is None or "run" not in runs.columns:
        return None
    res, fit, run = np.asarray(res, float), np.asarray(fit, float), np.asarray(run)
    if not (len(res) == len(fit) == len(run)):
        return None
    frame = pd.DataFrame({"run": run, "fitted": fit, "residual": res})
    if pos is not None and len(pos) == len(res):
        frame["position"] = np.asarray(pos, float)
    levels = runs.drop_duplicates("run").set_index("run")
    cols = list(factors) + ([] if "position" in frame.columns else ["position"])
    try:
        joined = levels.loc[frame["run"], cols].reset_index(drop=True)
    except KeyError:
        return None
    for c in cols:
        frame[c] = joined[c].astype(str).to_numpy() if c in factors else joined[c].to_numpy()
    return frame


def _normalise_residuals(frame):
    if frame is None:
        return None
    try:
        import pandas as pd

        frame = pd.DataFrame(frame)
    except Exception:
        return None
    if not {"fitted", "residual"} <= set(frame.columns):
        return None
    if "position" not in frame.columns:
        return None
    return frame


def _normalise_profile(prof):
    if prof is None:
        return None
    import pandas as pd

    if isinstance(prof, Mapping):
        lam = prof.get("lambda") or prof.get("lambdas")
        ll = prof.get("loglik") or prof.get("llf")
        if lam is None or ll is None:
            return None
        return pd.DataFrame({"lambda": list(lam), "loglik": list(ll)})
    try:
        frame = pd.DataFrame(prof)
    except Exception:
        return None
    if {"lambda", "loglik"} <= set(frame.columns):
        return frame
    return None


def finite(x) -> bool:
    try:
        return x is not None and math.isfinite(float(x))
    except (TypeError, ValueError):
        return False

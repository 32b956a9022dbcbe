"""Everything one report needs, gathered into one plain object (`ReportData`).

Renderers (figures, HTML, Markdown, terminal) read only `ReportData`; this module
is the edge that reads a results folder or a tidy CSV once, takes (or computes)
the analysis once, and lays out the per-run residuals and the Box-Cox profile
that the `Analysis` carries for the diagnostic figures. Nothing here fits a model.
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
        if getattr(experiment, "space", None) is not None:   # exclude: / only_when:
            from benchharness.design.exclude import space_cells

            d["cells_planned"] = len(space_cells(experiment)[0])
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
        return _gate_command(argv, seed)
    original = (session or {}).get("experiment_path")
    target = original if original and original != "<string>" else str(folder / "experiment.yaml")
    parts = ["benchharness", "run", str(target)]
    if seed is not None:
        parts += ["--seed", str(seed)]
    return " ".join(shlex.quote(p) for p in parts)


def _gate_command(argv: list, seed) -> str:
    """The gate's own command line, without --out (a new folder each time) and with the
    seed it used, so the blocks come in the same order."""
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


def _seed_used(session: dict, experiment) -> int | None:
    """The seed that ordered the runs: recorded by the runner, else the experiment's."""
    seed = session.get("seed") if session else None
    if seed is None and experiment is not None:
        seed = getattr(experiment, "seed", None)
    return seed


@dataclass(frozen=True)
class _Source:
    """What a report reads, read once: the runs and what the results folder says."""

    runs: Any                       # DataFrame as read (factor columns as the loader gives)
    text: str                       # how the source is named in messages
    experiment: Any = None
    host: Mapping[str, Any] = field(default_factory=dict)
    session: Mapping[str, Any] = field(default_factory=dict)
    folder: Path | None = None
    results: Any = None             # benchharness.results.journal.Results of a folder

    def for_analysis(self):
        """What `analyze` is given: the folder already read, else the table."""
        return self.results if self.results is not None else self.runs


def collect(source, *, analysis=None, response: str | None = None,
            factors: list[str] | None = None, block: str | None = None,
            compute_analysis: bool = True, **analyze_kwargs) -> ReportData:
    """Gather a `ReportData` from a results folder (a path, or one already read:
    `benchharness.results.journal.Results`), a CSV path or a DataFrame.

    ``analysis`` may be an `Analysis` object or an analysis.json dict; without it,
    a results folder's ``analysis.json`` is used when it answers the same question
    (same response and factors), else the analysis is computed. The source is read
    once; the per-run residuals, fitted values and Box-Cox profile of the figures
    come from the `Analysis` (for a stored analysis.json, from the analysis run
    again with the options it records).
    """
    src = _read_source(source, factors)
    factors = _factor_list(factors, src, analysis)
    runs = _text_factors(src.runs, factors)
    user_block = block
    adict, obj, notes = _analysis_for(src, runs, analysis, response, factors, user_block,
                                      compute_analysis, analyze_kwargs)
    response = adict.get("response") or response or "wall_s"
    if response not in runs.columns:
        raise DataError(f"{src.text}: no response column {response!r}")
    block = _block_used(adict, runs, factors, _default_block(block, src.experiment, runs))
    levels = _levels_from(runs, factors, src.experiment, adict)
    residuals = _residual_frame(obj, runs, factors) if obj is not None else None
    profile = _profile_frame(obj, adict, len(runs))
    extra, extra_notes = _extra_sections(src.folder, src.experiment, src.results)
    extra = trend_sections(adict) + extra
    from benchharness.measure.floor import note as floor_note

    extra_notes += floor_note(runs, src.session, response)  # peak memory at the launcher's size
    seed = _seed_used(src.session, src.experiment)
    return ReportData(
        name=_name_of(src), about=str(getattr(src.experiment, "about", None) or ""),
        response=response, factors=tuple(factors), levels=levels, analysis=adict, runs=runs,
        residuals=residuals, profile=profile,
        design=_design_section(src, runs, factors, levels, seed), host=dict(src.host),
        folder=src.folder, source=src.text,
        reproduce=_reproduce_command(src.folder, src.experiment, seed, src.session),
        block=block, extra=tuple(extra), extra_notes=tuple(notes + extra_notes),
        better=_declared_metric(src.folder, response),
    )


def _read_source(source, factors) -> _Source:
    """Read a results folder, CSV or DataFrame once."""
    import pandas as pd

    from benchharness.results.journal import Results

    if isinstance(source, pd.DataFrame):
        return _Source(runs=source, text="<table>")
    if isinstance(source, Results):
        return _folder_source(source)
    path = Path(source)
    if path.is_dir():
        from benchharness.results.journal import load_results

        return _folder_source(load_results(path))
    from benchharness.results.source import load_table

    runs, experiment = load_table(path, factors=factors)
    return _Source(runs=runs, text=str(path), experiment=experiment)


def _folder_source(res) -> _Source:
    return _Source(runs=res.runs, text=str(res.path), experiment=res.experiment,
                   host=dict(res.host or {}), session=dict(getattr(res, "session", {}) or {}),
                   folder=Path(res.path), results=res)


def _factor_list(factors, src: _Source, analysis) -> list[str]:
    """The factors asked for, else the experiment's, else the analysis'; all must be columns."""
    if factors is None:
        if src.experiment is not None:
            factors = list(src.experiment.factor_names)
        elif analysis is not None:
            factors = _factor_names(_as_dict(analysis))
        if not factors:
            raise DataError(f"{src.text}: name the factors (--factors A,B,...)")
    factors = list(factors)
    missing = [f for f in factors if f not in src.runs.columns]
    if missing:
        raise DataError(f"{src.text}: no column named {missing[0]!r} "
                        f"(columns: {', '.join(map(str, src.runs.columns))})")
    return factors


def _text_factors(runs, factors):
    """A copy of the runs with every factor column as text (what the renderers compare)."""
    runs = runs.copy()
    for f in factors:
        runs[f] = runs[f].astype(str)
    return runs


def _default_block(block, experiment, runs):
    """The block column a default analysis would use (before reading the analysis)."""
    if block is not None:
        return block
    if experiment is not None and getattr(experiment, "order", None) == "blocked" \
            and "block" in runs.columns:
        return "block"
    if "host" in runs.columns and runs["host"].nunique(dropna=True) > 1:
        return "host"
    return None


def _block_used(adict, runs, factors, block):
    """The block the analysis actually used, read from its ANOVA rows."""
    terms = {r.get("term") for r in adict.get("anova") or []}
    if adict.get("block") and adict["block"] in runs.columns:
        block = adict["block"]
    if block is not None and block not in terms:
        block = None
    if block is None:
        for cand in ("block", "host"):
            if cand in terms and cand in runs.columns and cand not in factors:
                block = cand
    return block


def _analysis_for(src: _Source, runs, analysis, response, factors, user_block,
                  compute_analysis: bool, analyze_kwargs):
    """(analysis dict as analysis.json, `Analysis` with the per-run arrays or None, notes).

    In order: the analysis given; the folder's analysis.json when it answers the
    same question; a table where nothing finished; the analysis computed here.
    """
    notes: list[str] = []
    if analysis is not None and not isinstance(analysis, Mapping):
        return _jsonable(_as_dict(analysis)), analysis, notes
    adict = _as_dict(analysis) if analysis is not None else _stored_analysis(src, response,
                                                                             factors)
    if adict is not None:
        obj = None
        if not adict.get("unanalysed"):
            obj, note = _arrays_for(adict, src, factors)
            notes += [note] if note else []
        return _jsonable(adict), obj, notes
    if response is None:   # the experiment file's response:, else wall_s
        from benchharness.experiment.response import default_response

        response = default_response(src.experiment)
    if nothing_finished(runs, response):
        # Every timed run failed or timed out: a report of the design and of why the runs
        # did not finish is still worth reading; there is just nothing to analyse.
        return _jsonable(unanalysed(runs, response, factors)), None, notes
    if not compute_analysis:
        raise DataError(f"{src.text}: no analysis to report")
    from benchharness import analyze

    obj = analyze(src.for_analysis(), response=response, factors=factors,
                  block=user_block, **analyze_kwargs)
    return _jsonable(_as_dict(obj)), obj, notes


def _stored_analysis(src: _Source, response, factors) -> dict | None:
    """The folder's analysis.json when it is about the same response and factors."""
    if src.folder is None or not (src.folder / "analysis.json").exists():
        return None
    stored = json.loads((src.folder / "analysis.json").read_text())
    same_resp = response is None or stored.get("response") == response
    same_fac = stored.get("factors") is None or _factor_names(stored) == factors
    return stored if same_resp and same_fac else None


def _arrays_for(adict: Mapping, src: _Source, factors):
    """(`Analysis`, None) of the runs with the options ``adict`` records, for the per-run
    figures; (None, why) when the runs no longer give that model.

    The tables shown stay those of ``adict``; only the residuals, fitted values and
    Box-Cox profile come from here (the same model, fitted once, by the analysis).
    """
    from benchharness import analyze
    from benchharness.errors import BenchharnessError

    model = adict.get("model") or {}
    tr = adict.get("transform") or {}
    spec = str(model.get("spec") or "full")
    block = adict.get("block")
    options = dict(
        response=adict.get("response") or "wall_s", factors=factors,
        block=(False if not block else block if block in src.runs.columns else None),
        transform=tr.get("requested") or tr.get("name") or "auto",
        ss_type=model.get("ss_type_requested") or model.get("ss_type") or 2,
        alpha=float(model.get("alpha") or adict.get("alpha") or 0.05),
        reference=model.get("references") or None, comparisons=False, art=False)
    # "full" is also what the default model records; the default is tried first
    for m in ([None, "full"] if spec == "full" else
              [None] if spec == "every alias chain" else [spec]):
        try:
            an = analyze(src.for_analysis(), model=m, **options)
        except BenchharnessError as exc:
            return None, _no_residuals(f"the analysis cannot be repeated ({exc})")
        if _same_model(an, adict):
            return an, None
    return None, _no_residuals("analysis.json describes a model the runs no longer give")


def _no_residuals(why: str) -> str:
    return (f"The residual figures are left out: {why}; `benchharness analyze` with --json "
            "writes a new analysis.json.")


def _same_model(an, adict: Mapping) -> bool:
    """Whether ``an`` fits the model and scale that ``adict`` records, on the same rows."""
    model, tr = adict.get("model") or {}, adict.get("transform") or {}
    lam, lam_an = tr.get("lambda"), an.transform.get("lambda")
    same_lam = (lam is None and lam_an is None) or (
        lam is not None and lam_an is not None and math.isclose(float(lam), float(lam_an),
                                                                rel_tol=1e-9, abs_tol=1e-12))
    return (list(an.model.get("terms") or []) == list(model.get("terms") or [])
            and an.transform.get("name") == tr.get("name") and same_lam
            and (adict.get("counts") or {}).get("rows") in (None, an.counts.get("rows")))


def _name_of(src: _Source) -> str:
    name = getattr(src.experiment, "name", None) or (
        src.folder.name if src.folder else "experiment" if src.text == "<table>"
        else Path(src.text).stem)
    return str(name)


def _design_section(src: _Source, runs, factors, levels, seed) -> dict:
    """The design facts of the report: counts, the experiment's settings, how it was run."""
    design = _design_of(src.experiment, runs, factors, levels)
    design["seed"] = seed
    if src.session.get("cwd"):
        design["run_from"] = src.session["cwd"]
    if src.session.get("benchharness_version"):
        design["version"] = src.session["benchharness_version"]
    return design


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


def trend_sections(adict: Mapping) -> list[dict]:
    """The sections on numeric factors' trends (`benchharness.report.trends`)."""
    from benchharness.report.trends import sections

    return sections(dict(adict)) if adict.get("trends") else []


def _extra_sections(folder, experiment, results=None):
    """Sections of later capabilities that the experiment file asks for.

    `choose:` -> "Choosing a default" (benchharness.choose.choice_section), given the
    folder already read (``results``) when there is one. A section that cannot be
    computed becomes a one-line note instead.
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
                sec = dict(choice_section(results if results is not None else folder))
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


def _residual_frame(obj, runs, factors):
    """Per-run residual table from an `Analysis`: run, position, factor levels (text),
    fitted and residual on the analysis scale; None when the arrays do not fit ``runs``."""
    import numpy as np
    import pandas as pd

    res, fit, rows = (getattr(obj, k, None) for k in ("residuals", "fitted", "rows"))
    if res is None or fit is None or rows is None:
        return None
    rows = np.asarray(rows)
    if len(rows) != len(res) or (len(rows) and int(rows.max()) >= len(runs)):
        return None   # an analysis of another table
    used = runs.iloc[rows]
    run = getattr(obj, "run", None)
    pos = getattr(obj, "position", None)
    frame = pd.DataFrame({
        "run": np.asarray(run) if run is not None else np.arange(len(rows)),
        "position": np.asarray(pos, float) if pos is not None else np.arange(len(rows)),
    })
    for f in factors:
        frame[f] = used[f].astype(str).to_numpy()
    frame["fitted"] = np.asarray(fit, float)
    frame["residual"] = np.asarray(res, float)
    return frame


def _profile_frame(obj, adict: Mapping, n_runs: int):
    """(lambda, loglik) of the Box-Cox profile: the analysis' own likelihood on a fine grid
    (up to 50,000 runs), else the grid analysis.json records; None without either."""
    import pandas as pd

    if obj is not None and n_runs <= 50_000 and getattr(obj, "boxcox", None) is not None:
        lam, ll = obj.profile_curve()
        return pd.DataFrame({"lambda": lam, "loglik": ll})
    prof = (adict.get("transform") or {}).get("profile")
    if not isinstance(prof, Mapping):
        return None
    lam, ll = prof.get("lambda"), prof.get("loglik")
    if lam is None or ll is None:
        return None
    return pd.DataFrame({"lambda": list(lam), "loglik": [float("nan") if v is None else v
                                                         for v in ll]})


def finite(x) -> bool:
    try:
        return x is not None and math.isfinite(float(x))
    except (TypeError, ValueError):
        return False

"""The experiment file's ``response:`` key: the column analysed when no one names another.

A workload that times its own work (a metric such as ``work_s``) is better judged by
that figure than by ``wall_s``, which adds the process start-up to every run. The key
names it once in the file, and `run`'s own analysis, ``analyze FOLDER``, ``report
FOLDER``, ``choose``, ``gate FILE`` (after ``gate: {response: ...}``), ``compare A B``
(A's file) and ``size`` (the pilot's or ``--levels FILE``'s) use it. Precedence, most specific first: the command line's
``--response``, then ``choose: {response: ...}`` (for `choose` only), then this key,
then ``wall_s``. Without the key, nothing changes for old files and folders.
"""

from __future__ import annotations

#: The response when neither the command line nor the experiment file names one.
DEFAULT_RESPONSE = "wall_s"


def declared_response(exp) -> str | None:
    """The ``response:`` the experiment file names, checked; None when it names none.

    It must be a measured column (a usage figure such as ``wall_s`` or
    ``max_rss_kib``), a ``metrics:`` name, ``steady_s`` with ``samples:``, or a
    ``perf_*`` counter with ``perf:``; anything else is an `ExperimentError` at the
    key's value (``FILE:LINE:COL:``) that lists the valid names."""
    import yaml

    from benchharness.experiment.yamlnodes import is_null, kind, node_error, scalar_text

    node = (getattr(exp, "sections", None) or {}).get("response")
    if node is None or is_null(node):
        return None
    path = getattr(exp, "path", None)
    from benchharness.measure.quality import response_columns

    known = response_columns(exp)
    if not isinstance(node, yaml.ScalarNode):
        raise node_error(node, f"'response' must be one column name, not {kind(node)}; "
                               f"use one of {', '.join(known)}", path)
    name = scalar_text(node, "'response'")
    if name in known:
        return name
    if name.startswith("perf_") and "perf" in (exp.sections or {}):
        return name
    raise node_error(node, f"'response': {name!r} is not a measured column or a declared "
                           f"metric; use one of {', '.join(known)}", path)


def default_response(exp) -> str:
    """The response analysed when the caller names none: the file's ``response:``,
    else ``wall_s`` (also for a table without an experiment file)."""
    if exp is None:
        return DEFAULT_RESPONSE
    return declared_response(exp) or DEFAULT_RESPONSE


def folder_response(folder) -> str | None:
    """The ``response:`` the frozen ``experiment.yaml`` of results folder FOLDER names;
    None when it names none or the folder has no readable experiment file (whoever reads
    the folder next reports that in its own words)."""
    from pathlib import Path

    from benchharness.errors import BenchharnessError

    path = Path(folder) / "experiment.yaml"
    if not path.is_file():
        return None
    try:
        from benchharness.experiment.file import load_experiment

        return declared_response(load_experiment(path))
    except BenchharnessError:
        return None

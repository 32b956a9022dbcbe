"""The ``metrics:`` section: responses a command reports about itself.

Besides wall time and resource usage, a run can report numbers of its own
(throughput, a latency percentile, a hit ratio).  Each metric names where its
value comes from, its unit and which direction is better:

    metrics:
      throughput_rps:
        pattern: 'served ([0-9.]+) requests/s'   # one capture group
        from: stderr                              # stdout (default) | stderr
        unit: req/s
        better: higher
      p99_ms:
        json: latency.p99_ms      # key path into the last JSON line of stdout
        unit: ms
        better: lower
      hit_ratio:
        file: 'out/{cache}/stats.json'   # a JSON file the command writes (templated)
        json: cache.hit_ratio
        unit: ratio
        better: higher

Each metric becomes a column of ``runs.csv`` named as the metric (so
``analyze --response NAME`` works on it); units and directions go to
``metrics.json`` in the results folder.  With ``pattern`` the *last* match in
the stream counts (programs often print progress first).  A value that cannot
be found or parsed makes that run's metric missing, with the reason appended to
the run's ``message`` — never a crash.  A ``file`` not rewritten since the run
started counts as missing (a stale file from an earlier run is not this run's
answer).
"""

from __future__ import annotations

import json
import math
import os
import re
from dataclasses import dataclass, field

_NAME = re.compile(r"^[A-Za-z_][A-Za-z0-9_]*$")
FILE_LIMIT_BYTES = 16 * 2**20


@dataclass(frozen=True)
class Metric:
    name: str
    unit: str
    better: str                        # lower | higher
    source: str                        # pattern | json | file
    pattern: re.Pattern | None = None
    stream: str = "stdout"
    key: str | None = None             # json key path
    file: str | None = None            # template text (rendered per cell by the runner)

    def describe(self) -> dict:
        d = {"unit": self.unit, "better": self.better, "source": self.source}
        if self.pattern is not None:
            d["pattern"] = self.pattern.pattern
            d["from"] = self.stream
        if self.key is not None:
            d["json"] = self.key
        if self.file is not None:
            d["file"] = self.file
        return d


@dataclass(frozen=True)
class MetricsConfig:
    metrics: tuple[Metric, ...] = field(default_factory=tuple)

    @property
    def names(self) -> tuple[str, ...]:
        return tuple(m.name for m in self.metrics)

    def manifest(self) -> dict:
        """Content of ``metrics.json``: ``{name: {unit, better, source, ...}}``."""
        return {m.name: m.describe() for m in self.metrics}

    def file_templates(self) -> dict[str, str]:
        return {m.name: m.file for m in self.metrics if m.file is not None}


def parse_metrics(node, factor_names=(), reserved=None) -> MetricsConfig:
    """Validate the ``metrics:`` node; errors are ``FILE:LINE:COL: ...`` one-liners."""
    from benchharness.experiment import yamlnodes as yn

    if reserved is None:
        from benchharness.experiment.file import RESERVED_COLUMNS as reserved
    return MetricsConfig(tuple(_parse_metric(name, knode, vnode, factor_names, reserved)
                               for name, knode, vnode in yn.mapping_items(node, "'metrics'")))


def _parse_metric(name: str, knode, vnode, factor_names, reserved) -> Metric:
    """One metric of the section: its name, direction, unit and source (pattern, json or file)."""
    from benchharness.experiment import yamlnodes as yn

    _check_metric_name(name, knode, factor_names, reserved)
    what = f"metric {name!r}"
    f = yn.expect_mapping(vnode, what, {"pattern", "from", "json", "file", "unit", "better"})
    if "better" not in f:
        raise yn.node_error(vnode, f"{what} needs `better: lower` or `better: higher` "
                                   "(which direction is an improvement)")
    better = yn.scalar_text(f["better"], f"{what}: better")
    if better not in ("lower", "higher"):
        raise yn.node_error(f["better"], f"{what}: better is {better!r}; use lower or higher")
    unit = "" if yn.is_null(f.get("unit")) else yn.scalar_text(f["unit"], f"{what}: unit")
    has = [k for k in ("pattern", "json", "file") if k in f]
    if "pattern" in f and ("json" in f or "file" in f):
        raise yn.node_error(vnode, f"{what} has both pattern and json/file; a metric reads "
                                   "one source")
    if not has:
        raise yn.node_error(vnode, f"{what} needs a source: pattern: REGEX (one group), "
                                   "json: KEY.PATH (last JSON line of stdout), or file: PATH "
                                   "with json: KEY.PATH")
    if "from" in f and "pattern" not in f:
        raise yn.node_error(f["from"], f"{what}: from applies to pattern only")
    if "pattern" in f:
        return _pattern_metric(name, unit, better, f, what)
    return _json_metric(name, unit, better, f, vnode, what)


def _check_metric_name(name: str, knode, factor_names, reserved) -> None:
    """A metric's name becomes a runs.csv column: a plain word, neither a factor nor a column."""
    from benchharness.experiment import yamlnodes as yn

    if not _NAME.match(name):
        raise yn.node_error(knode, f"metric name {name!r} must be letters, digits and _ "
                                   "(it becomes a column name), e.g. throughput_rps")
    if name in reserved or name in factor_names:
        what = "a factor" if name in factor_names else "a runs.csv column"
        raise yn.node_error(knode, f"metric name {name!r} is already {what}; pick another "
                                   "name")


def _pattern_metric(name: str, unit: str, better: str, f: dict, what: str) -> Metric:
    """A metric read by a regular expression with one group from stdout or stderr."""
    from benchharness.experiment import yamlnodes as yn

    text = yn.as_str(f["pattern"], f"{what}: pattern")
    try:
        rx = re.compile(text, re.MULTILINE)
    except re.error as exc:
        raise yn.node_error(f["pattern"], f"{what}: pattern is not a valid regular "
                                          f"expression ({exc})") from None
    if rx.groups != 1:
        raise yn.node_error(f["pattern"], f"{what}: pattern must have exactly one "
                                          f"capture group (it has {rx.groups}), e.g. "
                                          "'rate ([0-9.]+)'; use (?:...) for others")
    stream = "stdout"
    if "from" in f:
        stream = yn.scalar_text(f["from"], f"{what}: from")
        if stream not in ("stdout", "stderr"):
            raise yn.node_error(f["from"], f"{what}: from is {stream!r}; use stdout or "
                                           "stderr")
    return Metric(name, unit, better, "pattern", pattern=rx, stream=stream)


def _json_metric(name: str, unit: str, better: str, f: dict, vnode, what: str) -> Metric:
    """A metric read by a key path from stdout's last JSON line, or from a JSON file."""
    from benchharness.experiment import yamlnodes as yn

    if "file" in f and "json" not in f:
        raise yn.node_error(vnode, f"{what}: file needs json: KEY.PATH naming the value "
                                   "inside the file")
    key = yn.as_str(f["json"], f"{what}: json")
    if any(not part for part in key.split(".")):
        raise yn.node_error(f["json"], f"{what}: json key path {key!r} has an empty part; "
                                       "write e.g. latency.p99_ms")
    if "file" in f:
        tmpl = yn.as_str(f["file"], f"{what}: file")
        return Metric(name, unit, better, "file", key=key, file=tmpl)
    return Metric(name, unit, better, "json", key=key)


def _number(v, what: str) -> tuple[float | None, str]:
    if isinstance(v, bool) or v is None:
        return None, f"{what} is {json.dumps(v)}, not a number"
    if isinstance(v, (int, float)):
        f = float(v)
    elif isinstance(v, str):
        try:
            f = float(v.strip().replace("_", ""))
        except ValueError:
            return None, f"{what} is {v[:40]!r}, not a number"
    else:
        return None, f"{what} is a {type(v).__name__}, not a number"
    if not math.isfinite(f):
        return None, f"{what} is {v!r}, not a finite number"
    return f, ""


def _text(b) -> str:
    return b.decode("utf-8", "replace") if isinstance(b, bytes) else (b or "")


def extract_metrics(config: MetricsConfig, stdout_tail, stderr_tail,
                    rendered_files: dict[str, str] | None = None,
                    started_at_epoch: float | None = None,
                    cwd: str | None = None,
                    files_before: dict | None = None) -> tuple[dict, dict]:
    """``(values, reasons)``: each metric's value (float or None) and why it is missing.

    ``rendered_files`` maps a file metric's name to its path for this run
    (relative paths are taken from ``cwd``); ``started_at_epoch`` (seconds)
    lets a file older than the run be treated as stale; ``files_before``
    (from `snapshot_files`, taken just before the run) is the sharper test: a
    file whose modification time and size did not change is stale.
    """
    from benchharness.measure.steady.samples import key_path, last_json_line

    values: dict[str, float | None] = {}
    reasons: dict[str, str] = {}
    texts = {"stdout": _text(stdout_tail), "stderr": _text(stderr_tail)}
    last_json = None
    for m in config.metrics:
        value, why = None, ""
        try:
            if m.source == "pattern":
                from benchharness.measure.expect import bounded

                text, rx = texts[m.stream], m.pattern
                matches = bounded(lambda: list(rx.finditer(text)), rx.pattern)
                if not matches:
                    why = f"/{m.pattern.pattern}/ not found in {m.stream}"
                else:
                    value, why = _number(matches[-1].group(1), f"the match in {m.stream}")
            elif m.source == "json":
                if last_json is None:
                    last_json = last_json_line(texts["stdout"]) or False
                if last_json is False:
                    why = "no JSON line on stdout"
                else:
                    try:
                        value, why = _number(key_path(last_json, m.key), f"{m.key!r}")
                    except KeyError as exc:
                        why = f"{exc.args[0]} in the last JSON line of stdout"
            else:
                path = _resolve((rendered_files or {}).get(m.name) or m.file, cwd)
                before = (files_before or {}).get(m.name, _MISSING)
                value, why = _from_file(path, m.key, started_at_epoch, before)
        except Exception as exc:  # noqa: BLE001 - a metric never crashes the run loop
            value, why = None, f"could not read: {type(exc).__name__}: {exc}"
        values[m.name] = value
        if value is None:
            reasons[m.name] = why or "no value"
    return values, reasons


_MISSING = object()


def _resolve(path: str, cwd: str | None) -> str:
    if cwd and not os.path.isabs(path):
        return os.path.join(cwd, path)
    return path


def _stamp(path: str):
    try:
        st = os.stat(path)
    except OSError:
        return None
    return (st.st_mtime_ns, st.st_size, st.st_ino)


def snapshot_files(config: MetricsConfig, rendered_files: dict[str, str] | None = None,
                   cwd: str | None = None) -> dict:
    """Stamps of the file metrics' files just before a run (None: file absent)."""
    out = {}
    for m in config.metrics:
        if m.source == "file":
            out[m.name] = _stamp(_resolve((rendered_files or {}).get(m.name) or m.file, cwd))
    return out


def _from_file(path: str, key: str, started_at_epoch: float | None,
               before=_MISSING) -> tuple[float | None, str]:
    from benchharness.measure.steady.samples import key_path

    try:
        st = os.stat(path)
    except OSError:
        return None, f"file {path} does not exist"
    if before is not _MISSING and before is not None and before == _stamp(path):
        return None, f"file {path} was not rewritten by this run (stale)"
    if before is _MISSING and started_at_epoch is not None and \
            st.st_mtime < started_at_epoch - 0.05:
        return None, f"file {path} was not rewritten by this run (stale)"
    if st.st_size > FILE_LIMIT_BYTES:
        return None, f"file {path} is larger than {FILE_LIMIT_BYTES // 2**20} MiB"
    try:
        with open(path, encoding="utf-8") as fh:
            data = json.load(fh)
    except (OSError, UnicodeDecodeError) as exc:
        return None, f"file {path} could not be read ({exc})"
    except ValueError as exc:
        return None, f"file {path} is not valid JSON ({exc})"
    try:
        return _number(key_path(data, key), f"{key!r} in {path}")
    except KeyError as exc:
        return None, f"{exc.args[0]} in {path}"


def reasons_message(reasons: dict[str, str]) -> str:
    """One line for the run's ``message`` column."""
    return "; ".join(f"metric {k} missing: {v}" for k, v in reasons.items())


def read_manifest(folder) -> dict:
    """``metrics.json`` of a results folder as a dict ({} when absent or unreadable)."""
    try:
        with open(os.path.join(str(folder), "metrics.json"), encoding="utf-8") as fh:
            data = json.load(fh)
    except (OSError, ValueError):
        return {}
    return data if isinstance(data, dict) else {}


def better_direction(folder, response: str) -> str:
    """``lower`` or ``higher`` for a response: from metrics.json, else ``lower``.

    Built-in responses (``wall_s``, ``user_s``, ``max_rss_kib``, ...) are all
    costs, so lower is better.
    """
    entry = read_manifest(folder).get(response) or {}
    return entry.get("better") if entry.get("better") in ("lower", "higher") else "lower"

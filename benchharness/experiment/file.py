"""The experiment file: loading and validating it into an `Experiment`.

An experiment file is YAML naming a command, the factors and their levels, how
many replicates to run and how. It is *composed* into a node tree rather than
loaded, so that (a) every error points at ``FILE:LINE:COL`` with what is wrong
and what would be right, (b) level labels are the scalar's source text (``off``,
``1.10`` and ``010`` stay exactly those strings; ``1`` and ``1.0`` are different
levels), and (c) no YAML tag can construct an object.

Sections that belong to later capabilities (``design``, ``gate``, ``choose``,
``metrics`` ...) are kept as raw nodes in `Experiment.sections`; each capability
validates its own section with the helpers in `benchharness.experiment.yamlnodes`.
"""

from __future__ import annotations

from benchharness.numbers import plural

import os
import re
import shlex
from dataclasses import dataclass, field
from pathlib import Path
from typing import Mapping

import yaml

from benchharness.experiment import templating
from benchharness.experiment.space import Space, parse_space
from benchharness.errors import ExperimentError
from benchharness.design.surface import expand_factors as expand_surface_factors
from benchharness.experiment.yamlnodes import (
    as_bool, as_duration_s, as_int, check_tags, is_null, kind, mapping_items, node_error,
    scalar_text, suggest,
)

#: Columns of runs.csv (and later additions) that a factor may not be named.
RESERVED_COLUMNS = frozenset({
    "run", "position", "block", "replicate", "status", "exit_code", "wall_s", "user_s",
    "sys_s", "max_rss_kib", "minor_faults", "major_faults", "voluntary_switches",
    "involuntary_switches", "in_blocks", "out_blocks", "started_at", "message", "host",
    "worker", "host_position", "warmup", "levels", "metrics", "load_1m", "cpu_mhz",
    "pad_env_bytes", "aslr", "steady_s", "steady_state", "gate_role", "session", "cell",
    "pgid", "pid", "max_rss_at_floor",
})

#: Keys of the core experiment file.
CORE_KEYS = ("experiment", "about", "command", "shell", "factors", "replicates", "warmup",
             "order", "seed", "timeout", "env", "build", "reset", "teardown", "workdir",
             "max_runs")

#: Sections validated by later capabilities; kept as raw YAML nodes.
SECTION_KEYS = ("design", "gate", "choose", "roles", "compare", "metrics", "expect", "samples", "pin",
                "response",
                "nice", "clean_env", "pad_env", "aslr", "cold_cache", "perf", "host_check",
                "exclude", "only_when", "numeric")

ORDERS = ("randomized", "blocked", "listed")

_NAME_RE = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.-]*$")


@dataclass(frozen=True)
class Level:
    """One level of a factor: its label (source text) and its named values."""

    label: str
    values: Mapping[str, str] = field(default_factory=dict)


@dataclass(frozen=True)
class Factor:
    name: str
    levels: tuple[Level, ...]

    @property
    def labels(self) -> tuple[str, ...]:
        return tuple(lv.label for lv in self.levels)


@dataclass(frozen=True)
class CommandTemplate:
    """A templated command. ``shell`` False: ``parts`` are argv templates (one
    argument each). ``shell`` True: ``parts`` are joined by spaces and given to
    ``/bin/sh -c``, every substituted value arriving as exactly itself whether its
    placeholder stands bare or inside quotes (`templating.render_shell`)."""

    parts: tuple[str, ...]
    shell: bool = False

    def render(self, lookup) -> tuple[tuple[str, ...] | None, str | None]:
        """``(argv, None)`` or ``(None, shell_command)`` for one cell."""
        if self.shell:
            return None, templating.render_shell(" ".join(self.parts), lookup)
        return tuple(templating.render(p, lookup) for p in self.parts), None

    def text(self) -> str:
        return " ".join(self.parts) if self.shell else shlex.join(self.parts)


@dataclass(frozen=True)
class Experiment:
    """A validated experiment file (plain data; no I/O after loading)."""

    name: str
    about: str
    command: CommandTemplate
    factors: tuple[Factor, ...]
    replicates: int = 1
    warmup: int = 0
    order: str = "randomized"
    seed: int | None = None
    timeout_s: float | None = None
    shell: bool = False
    env: Mapping[str, str] = field(default_factory=dict)
    build: CommandTemplate | None = None
    reset: CommandTemplate | None = None
    teardown: CommandTemplate | None = None
    workdir: str | None = None
    path: str = "<string>"
    source_text: str = ""
    sections: Mapping[str, yaml.Node] = field(default_factory=dict)
    warnings: tuple[str, ...] = ()
    #: Most runs a plan of this file may hold (``max_runs:``; `DEFAULT_MAX_RUNS`).
    max_runs: int = 0
    #: ``{top-level key: (line, column)}`` of the file, for messages about a whole key.
    key_marks: Mapping[str, tuple[int, int]] = field(default_factory=dict)
    #: excluded combinations and conditional factors (`benchharness.experiment.space`)
    space: "Space | None" = None

    # -- convenience -------------------------------------------------------
    @property
    def factor_names(self) -> tuple[str, ...]:
        return tuple(f.name for f in self.factors)

    def factor(self, name: str) -> Factor:
        for f in self.factors:
            if f.name == name:
                return f
        raise KeyError(name)

    def levels_of(self, name: str) -> tuple[str, ...]:
        """The labels runs of factor ``name`` may carry: its levels, then ``-`` for a
        conditional factor where it does not apply (`benchharness.experiment.space`)."""
        labels = self.factor(name).labels
        return labels if self.space is None else self.space.levels_in_runs(name, labels)

    @property
    def cells(self) -> int:
        n = 1
        for f in self.factors:
            n *= len(f.levels)
        return n

    def lookup(self, levels: Mapping[str, str]):
        """Template lookup for a cell given as factor → label (a conditional factor that
        does not apply renders empty, its named values too)."""
        table = self._level_values
        values = {}
        for name, by_label in table:
            v = by_label.get(levels[name])
            if v is not None:
                values[name] = v
        if self.space is not None:
            off = self.space.off(levels)
            if off:
                levels = {k: ("" if k in off else v) for k, v in levels.items()}
                values.update({k: _Empty() for k in off})
        return templating.level_lookup(levels, values)

    @property
    def _level_values(self) -> tuple:
        """``((factor, {label: named values}), ...)``, made once (a plan renders every cell)."""
        cached = self.__dict__.get("_level_values_cache")
        if cached is None:
            cached = tuple((f.name, {lv.label: lv.values for lv in reversed(f.levels)})
                           for f in self.factors)
            self.__dict__["_level_values_cache"] = cached   # frozen: set past __setattr__
        return cached

    # ``lookup``: `lookup(levels)` made once by a caller that renders several templates
    # of the same cell.
    def render_command(self, template: CommandTemplate, levels: Mapping[str, str], lookup=None):
        if self.space is not None and not template.shell:
            off = self.space.off(levels)
            if off:   # an argument naming a factor that does not apply is left out whole
                template = CommandTemplate(tuple(
                    p for p in template.parts
                    if not any(ph.factor in off for ph in templating.placeholders(p))))
        return template.render(lookup or self.lookup(levels))

    def render_env(self, levels: Mapping[str, str], lookup=None) -> dict[str, str]:
        lookup = lookup or self.lookup(levels)
        return {k: templating.render(v, lookup) for k, v in self.env.items()}

    def render_workdir(self, levels: Mapping[str, str], lookup=None) -> str | None:
        if self.workdir is None:
            return None
        return templating.render(self.workdir, lookup or self.lookup(levels))

    @classmethod
    def from_text(cls, text: str, path: str = "<string>") -> "Experiment":
        return parse_experiment(text, path)


class _Empty(dict):
    """Named values of a conditional factor where it does not apply: every one is empty."""

    def __missing__(self, key):
        return ""


# ---------------------------------------------------------------------------

#: Largest experiment file read (bytes): a real one is a few kilobytes.
MAX_FILE_BYTES = 1 << 20
#: Deepest nesting of lists and mappings accepted (a real file nests 4 or 5 deep).
MAX_DEPTH = 40
#: Most runs a plan may hold unless the file raises the limit with ``max_runs:``.
DEFAULT_MAX_RUNS = 1_000_000
#: Highest ``max_runs:`` accepted: every planned run is held in memory.
MAX_RUNS_CEILING = 5_000_000
#: Most values (scalars, lists, mappings) the file may stand for once its
#: aliases (``*name``) are expanded; each node is measured once, never walked twice.
MAX_VALUES = 100_000


def read_experiment_text(path: str | os.PathLike) -> str:
    """The text of an experiment file: a regular file of at most `MAX_FILE_BYTES`.

    Opened without blocking, so a FIFO with no writer, a terminal or a device
    such as ``/dev/zero`` is refused at once instead of hanging or filling memory.
    """
    import stat

    where = str(path)
    try:
        fd = os.open(path, os.O_RDONLY | os.O_NONBLOCK | os.O_CLOEXEC)
    except FileNotFoundError:
        raise ExperimentError("no such experiment file; give the path of a YAML experiment "
                              "file", path=where) from None
    except IsADirectoryError:
        raise ExperimentError("is a folder, not an experiment file", path=where) from None
    except OSError as exc:
        raise ExperimentError(f"cannot be read ({exc.strerror})", path=where) from None
    chunks: list[bytes] = []
    try:
        st = os.fstat(fd)
        if stat.S_ISDIR(st.st_mode):
            raise ExperimentError("is a folder, not an experiment file", path=where)
        if not stat.S_ISREG(st.st_mode):
            what = ("a FIFO (named pipe)" if stat.S_ISFIFO(st.st_mode) else
                    "a device" if stat.S_ISCHR(st.st_mode) or stat.S_ISBLK(st.st_mode) else
                    "a socket" if stat.S_ISSOCK(st.st_mode) else "not a regular file")
            raise ExperimentError(f"is {what}, not a regular file; give the path of a YAML "
                                  "experiment file saved on disk", path=where)
        total = 0
        while total <= MAX_FILE_BYTES:
            b = os.read(fd, MAX_FILE_BYTES + 1 - total)
            if not b:
                break
            chunks.append(b)
            total += len(b)
        if total > MAX_FILE_BYTES:
            raise ExperimentError(f"holds more than {MAX_FILE_BYTES:,} bytes; an experiment file "
                                  f"may hold at most {MAX_FILE_BYTES:,} (is this the right "
                                  "file?)", path=where)
    except ExperimentError:
        raise
    except OSError as exc:
        raise ExperimentError(f"cannot be read ({exc.strerror})", path=where) from None
    finally:
        os.close(fd)
    try:
        return b"".join(chunks).decode("utf-8")
    except UnicodeDecodeError as exc:
        raise ExperimentError(f"is not UTF-8 text ({exc.reason})", path=where) from None


def load_experiment(path: str | os.PathLike) -> Experiment:
    """Read and validate an experiment file; raises `ExperimentError` with a located message."""
    return parse_experiment(read_experiment_text(path), str(path))


class _Bounded(Exception):
    """A composed file beyond our bounds (depth, alias expansion, loops, NUL)."""

    def __init__(self, mark, message: str):
        super().__init__(message)
        self.mark = mark
        self.message = message


def _compose(text: str, path: str) -> yaml.Node:
    if len(text) > MAX_FILE_BYTES:
        raise ExperimentError(f"holds {len(text):,} characters; an experiment file may hold at "
                              f"most {MAX_FILE_BYTES:,}", path=path)
    try:
        nodes = list(yaml.compose_all(text, Loader=_Loader(path)))
    except _Bounded as exc:
        mark = exc.mark
        raise ExperimentError(exc.message, path=path,
                              line=mark.line + 1 if mark else None,
                              col=mark.column + 1 if mark else None) from None
    except RecursionError:  # pragma: no cover - the depth bound comes first
        raise ExperimentError(f"values are nested too deeply; at most {MAX_DEPTH} levels of "
                              "lists and mappings", path=path) from None
    except yaml.MarkedYAMLError as exc:
        mark = exc.problem_mark or exc.context_mark
        what = exc.problem or exc.context or "malformed YAML"
        raise ExperimentError(f"YAML syntax error: {what}; check indentation, colons and "
                              "quotes here", path=path,
                              line=mark.line + 1 if mark else None,
                              col=mark.column + 1 if mark else None) from None
    except yaml.reader.ReaderError as exc:
        # a character YAML does not allow (NUL, most control characters): locate it
        pos = exc.position if isinstance(exc.position, int) else 0
        before = text[:pos]
        line, col = before.count("\n") + 1, pos - (before.rfind("\n") + 1) + 1
        ch = exc.character if isinstance(exc.character, int) else ord(str(exc.character)[:1] or "\0")
        raise ExperimentError(f"the character U+{ch:04X} is not allowed in YAML; "
                              "remove it (a control character or binary data)", path=path,
                              line=line, col=col) from None
    except yaml.YAMLError as exc:
        raise ExperimentError("YAML syntax error: " + " ".join(str(exc).split()),
                              path=path) from None
    if not nodes or nodes[0] is None:
        raise ExperimentError("the experiment file is empty; it needs at least 'experiment', "
                              "'command' and 'factors'", path=path, line=1, col=1)
    if len(nodes) > 1:
        raise node_error(nodes[1], "the file holds several YAML documents; keep one "
                                   "experiment per file")
    return nodes[0]


class _BoundedLoader(yaml.SafeLoader):
    """A SafeLoader that names the file in marks and composes within bounds.

    Composing (not constructing) keeps an alias as a shared node. This loader
    also keeps, for every node, how many values and how deep it would be with
    its aliases expanded, computed once per node from its children's figures,
    so a file whose aliases stand for billions of values (an "alias bomb") is
    refused after one pass instead of being walked as a tree. An alias inside
    the value it names (a loop), nesting deeper than `MAX_DEPTH` (the composer
    recurses) and NUL characters (no command, environment or path can carry
    one) are refused too.
    """

    def __init__(self, stream, name: str):
        super().__init__(stream)
        self.name = name
        self._depth = 0
        self._open: set = set()
        self._measure: dict[int, tuple[int, int]] = {}  # id(node) -> (values, depth)

    def compose_node(self, parent, index):
        from yaml.events import AliasEvent

        event = self.peek_event()
        if isinstance(event, AliasEvent):
            if event.anchor in self._open:
                raise _Bounded(event.start_mark,
                               f"the alias *{event.anchor} stands inside the value it names "
                               f"(&{event.anchor}), a loop; refer only to a value defined "
                               "before and outside it")
            return super().compose_node(parent, index)
        self._depth += 1
        if self._depth > MAX_DEPTH:
            raise _Bounded(event.start_mark, f"values are nested more than {MAX_DEPTH} deep; "
                                             "an experiment file needs a few levels of lists "
                                             "and mappings")
        anchor = getattr(event, "anchor", None)
        if anchor is not None:
            self._open.add(anchor)
        try:
            node = super().compose_node(parent, index)
        finally:
            self._depth -= 1
            if anchor is not None:
                self._open.discard(anchor)
        self._account(node)
        return node

    def _account(self, node) -> None:
        if isinstance(node, yaml.ScalarNode):
            if "\x00" in node.value:
                raise _Bounded(node.start_mark, "this value holds a NUL character (\\0), which "
                                                "no command line, environment or path can "
                                                "carry; remove it")
            self._measure[id(node)] = (1, 1)
            return
        if isinstance(node, yaml.MappingNode):
            children = [c for pair in node.value for c in pair]
        else:
            children = node.value
        count, depth = 1, 1
        for c in children:
            cn, cd = self._measure.get(id(c), (1, 1))
            count += cn
            depth = max(depth, cd + 1)
        self._measure[id(node)] = (count, depth)
        if count > MAX_VALUES:
            raise _Bounded(node.start_mark, f"with its aliases (*name) expanded this value "
                                            f"stands for {count:,} values, more than the "
                                            f"{MAX_VALUES:,} an experiment file may hold; "
                                            "write the values out or use fewer aliases")
        if depth > MAX_DEPTH:
            raise _Bounded(node.start_mark, f"with its aliases (*name) expanded this value is "
                                            f"nested {depth} deep, more than {MAX_DEPTH}; "
                                            "use fewer nested aliases")


def _Loader(path: str):
    """A loader factory naming the file in marks (see `_BoundedLoader`)."""

    def make(stream):
        return _BoundedLoader(stream, path)

    return make


def parse_experiment(text: str, path: str = "<string>") -> Experiment:
    """Validate an experiment file's text into an `Experiment`.

    The steps follow the file's reading order: the top-level keys, the core values,
    the commands and steps, then the placeholders that tie them to the factors. The
    first problem found is raised as an `ExperimentError` at its line; sections of
    later capabilities are kept as raw nodes for their owners to validate."""
    root = _compose(text, path)
    check_tags(root)
    nodes, keynodes = _top_level_nodes(root, path)
    name = _parse_name(nodes["experiment"])
    about = "" if is_null(nodes.get("about")) else scalar_text(nodes["about"], "'about'")
    shell = as_bool(nodes["shell"], "'shell'") if "shell" in nodes else False
    factors = _parse_factors(nodes["factors"])
    factors = expand_surface_factors(factors, nodes["factors"], nodes.get("design"), path)
    factor_map = {f.name: f for f in factors}
    command = _parse_command(nodes["command"], "'command'", shell)
    sections: dict[str, yaml.Node] = {k: nodes[k] for k in SECTION_KEYS if k in nodes}
    replicates = _parse_replicates(nodes.get("replicates"), sections)
    warmup = as_int(nodes["warmup"], "'warmup'", minimum=0) if "warmup" in nodes else 0
    order = _parse_order(nodes)
    seed = as_int(nodes["seed"], "'seed'", minimum=0) if _given(nodes, "seed") else None
    max_runs = _parse_max_runs(nodes)
    timeout_s = (as_duration_s(nodes["timeout"], "'timeout'") if _given(nodes, "timeout")
                 else None)
    env = _parse_env(nodes["env"]) if _given(nodes, "env") else {}
    steps = {step: _parse_command(nodes[step], f"'{step}'", shell)
             for step in ("build", "reset", "teardown") if _given(nodes, step)}
    workdir = scalar_text(nodes["workdir"], "'workdir'") if _given(nodes, "workdir") else None

    used = _check_placeholders(_templated_texts(nodes, steps, sections, workdir), factor_map)
    if shell:
        _check_shell_values(nodes, command, steps, factor_map)
    found_warnings = _unused_factor_warnings(nodes["factors"], factors, used, path)
    space = parse_space(nodes, factors, path)   # exclude: / only_when: (experiment.space)
    found_warnings += space.warnings if space is not None else []

    return Experiment(
        name=name, about=about, command=command, factors=factors, replicates=replicates,
        warmup=warmup, order=order, seed=seed, timeout_s=timeout_s, shell=shell, env=env,
        build=steps.get("build"), reset=steps.get("reset"), teardown=steps.get("teardown"),
        workdir=workdir, path=path, source_text=text, sections=sections,
        warnings=tuple(found_warnings), max_runs=max_runs, space=space,
        key_marks={k: (kn.start_mark.line + 1, kn.start_mark.column + 1)
                   for k, kn in keynodes.items()},
    )


#: What to write when a required top-level key is missing.
_REQUIRED_KEYS = {
    "experiment": "name the experiment, e.g. experiment: archive-codecs",
    "command": "give the command to benchmark, e.g. "
               "command: [./app, --threads, \"{threads}\"]",
    "factors": "list the factors and their levels, e.g. factors: {threads: [1, 2, 4]}",
}


def _top_level_nodes(root: yaml.Node, path: str) -> tuple[dict[str, yaml.Node],
                                                           dict[str, yaml.Node]]:
    """The file's top-level value nodes and key nodes by key; refuses a file that is
    not a mapping, an unknown key, or a missing required key."""
    if not isinstance(root, yaml.MappingNode):
        raise node_error(root, f"the experiment file must be a mapping of keys (experiment:, "
                               f"command:, factors:, ...), not {kind(root)}", path)
    known = set(CORE_KEYS) | set(SECTION_KEYS)
    nodes: dict[str, yaml.Node] = {}
    keynodes: dict[str, yaml.Node] = {}
    for key, knode, vnode in mapping_items(root, "the experiment file"):
        if key not in known:
            raise node_error(knode, f"unknown key {key!r}; {suggest(key, known)}")
        nodes[key] = vnode
        keynodes[key] = knode
    for req, hint in _REQUIRED_KEYS.items():
        if req not in nodes:
            raise node_error(root, f"missing the key {req!r}; {hint}")
    return nodes, keynodes


def _given(nodes: Mapping[str, yaml.Node], key: str) -> bool:
    """Whether the file gives ``key`` a value (present and not empty/null)."""
    return key in nodes and not is_null(nodes[key])


def _parse_replicates(rep_node: yaml.Node | None, sections: dict[str, yaml.Node]) -> int:
    """The replicate count; for adaptive replication (a mapping) the section is kept
    for the design capability to validate and the plan starts from its ``min``."""
    if rep_node is None:
        return 1
    if not isinstance(rep_node, yaml.MappingNode):
        return as_int(rep_node, "'replicates'", minimum=1)
    sections["replicates"] = rep_node
    replicates = 3
    for key, _k, v in mapping_items(rep_node, "'replicates'"):
        if key == "min":
            replicates = as_int(v, "'replicates: min'", minimum=1)
    return replicates


def _parse_order(nodes: Mapping[str, yaml.Node]) -> str:
    """The run order (one of `ORDERS`; randomized unless the file says otherwise)."""
    if "order" not in nodes:
        return "randomized"
    order = scalar_text(nodes["order"], "'order'")
    if order not in ORDERS:
        raise node_error(nodes["order"], f"'order' must be one of {', '.join(ORDERS)}, "
                                         f"not {order!r}")
    return order


def _parse_max_runs(nodes: Mapping[str, yaml.Node]) -> int:
    """The most runs a plan may hold, at most `MAX_RUNS_CEILING`."""
    if not _given(nodes, "max_runs"):
        return DEFAULT_MAX_RUNS
    max_runs = as_int(nodes["max_runs"], "'max_runs'", minimum=1)
    if max_runs > MAX_RUNS_CEILING:
        raise node_error(nodes["max_runs"], f"'max_runs' may be at most "
                                            f"{MAX_RUNS_CEILING:,} (a plan that size "
                                            f"already takes gigabytes), not {max_runs:,}")
    return max_runs


def _parse_env(node: yaml.Node) -> dict[str, str]:
    """The ``env:`` mapping: valid variable names, each with a single value."""
    env: dict[str, str] = {}
    for key, knode, vnode in mapping_items(node, "'env'"):
        if not re.fullmatch(r"[A-Za-z_][A-Za-z0-9_]*", key):
            raise node_error(knode, f"environment variable name {key!r} is not valid; use "
                                    "letters, digits and underscores")
        if isinstance(vnode, yaml.ScalarNode) and not is_null(vnode):
            env[key] = vnode.value
        else:
            raise node_error(vnode, f"'env: {key}' must be a single value, not {kind(vnode)}")
    return env


def _templated_texts(nodes: Mapping[str, yaml.Node], steps: Mapping[str, CommandTemplate],
                     sections: Mapping[str, yaml.Node],
                     workdir: str | None) -> list[tuple[str, yaml.Node]]:
    """Every text that may hold placeholders, with its node (for the error's line):
    the command, the steps, env values, the workdir, and the pin/nice sections
    (metrics/expect hold regexes; their owners check them)."""
    templated: list[tuple[str, yaml.Node]] = []
    templated += _template_nodes(nodes["command"])
    for step in steps:
        templated += _template_nodes(nodes[step])
    if _given(nodes, "env"):
        templated += [(v.value, v) for _k, v in nodes["env"].value]
    if workdir is not None:
        templated.append((workdir, nodes["workdir"]))
    for key in ("pin", "nice"):
        if key in sections:
            templated += _template_nodes(sections[key])
    return templated


def _check_placeholders(templated: list[tuple[str, yaml.Node]],
                        factor_map: Mapping[str, Factor]) -> set[str]:
    """Every placeholder must name a factor (and a named value each of its levels has);
    returns the names of the factors used."""
    used: set[str] = set()
    for text_, node in templated:
        try:
            phs = templating.placeholders(text_)
        except ValueError as exc:
            raise node_error(node, str(exc)) from None
        for ph in phs:
            f = factor_map.get(ph.factor)
            if f is None:
                hint = (suggest(ph.factor, factor_map) if factor_map else "")
                raise node_error(node, f"placeholder {ph.text} names no factor; "
                                       + (hint.replace("known keys", "factors are")
                                          if hint else "declare it under 'factors'"))
            used.add(f.name)
            if ph.name is not None:
                _check_named_value(ph, f, node)
    return used


def _check_named_value(ph, f: Factor, node: yaml.Node) -> None:
    """A ``{factor.name}`` placeholder needs that named value on every level."""
    for lv in f.levels:
        if ph.name not in lv.values:
            have = ", ".join(sorted(lv.values)) or "none"
            raise node_error(node, f"placeholder {ph.text}: level {lv.label!r} of "
                                   f"factor {f.name!r} has no value named "
                                   f"{ph.name!r} (it has: {have}); give every "
                                   "level that value")


def _check_shell_values(nodes: Mapping[str, yaml.Node], command: CommandTemplate,
                        steps: Mapping[str, CommandTemplate],
                        factor_map: Mapping[str, Factor]) -> None:
    """With ``shell: true``, every level's value must be safe where its placeholder
    stands (see `templating.render_shell`)."""
    for key, tmpl in (("command", command), *steps.items()):
        for ph, ctx in templating.shell_contexts(" ".join(tmpl.parts)):
            f = factor_map[ph.factor]
            for lv in f.levels:
                value = lv.label if ph.name is None else lv.values[ph.name]
                why = templating.check_shell_value(ph.text, ctx, value)
                if why:
                    raise node_error(nodes[key], f"{why} (level {lv.label!r} of factor "
                                                 f"{f.name!r})")


def _unused_factor_warnings(factors_node: yaml.Node, factors: tuple[Factor, ...],
                            used: set[str], path: str) -> list[str]:
    """A warning for each factor no command, env or step mentions: its levels would
    not change what runs."""
    found_warnings = []
    key_marks = {k: kn.start_mark for k, kn, _v in mapping_items(factors_node, "'factors'")}
    for f in factors:
        if f.name not in used:
            mark = key_marks.get(f.name)
            where = f"{path}:{mark.line + 1}:{mark.column + 1}" if mark else f"{path}"
            found_warnings.append(
                f"{where}: factor {f.name!r} is used in no command, env or step; its levels "
                f"will not change what runs (write {{{f.name}}} where it belongs)")
    return found_warnings


def check_planned_runs(exp: Experiment, cells: int, replicates: int, warmup: int) -> int:
    """The number of runs a plan of ``cells`` cells would hold; `ExperimentError` above
    the file's limit (``max_runs:``), said before anything is built, so a slip such as
    ``replicates: 1000000000`` or forty factors never fills memory with planned runs."""
    total = cells * (replicates + warmup)
    limit = exp.max_runs or DEFAULT_MAX_RUNS
    if total <= limit:
        return total
    key = "replicates" if replicates * (1 + (warmup > 0)) >= cells else "factors"
    line, col = exp.key_marks.get(key, (None, None))
    parts = f"{plural(cells, 'cell')} × {plural(replicates, 'replicate')}"
    if warmup:
        parts = f"{plural(cells, 'cell')} × ({plural(replicates, 'replicate')} + {warmup:,} warm-up)"
    advice = "use fewer factors, levels or replicates (or a fractional 'design:')"
    if total <= MAX_RUNS_CEILING:
        advice += f", or, if you mean it, raise the limit with 'max_runs: {total}'"
    raise ExperimentError(f"this experiment plans {total:,} runs ({parts}), more than the "
                          f"limit of {limit:,}; {advice}", path=exp.path, line=line, col=col)


def _parse_name(node: yaml.Node) -> str:
    if is_null(node):
        raise node_error(node, "'experiment' is empty; give the experiment a name such as "
                               "archive-codecs")
    name = scalar_text(node, "'experiment'")
    if not _NAME_RE.match(name) or len(name) > 100:
        raise node_error(node, f"experiment name {name!r} cannot name a results folder; use "
                               "letters, digits, '-', '_' and '.' (e.g. archive-codecs)")
    return name


def _parse_factors(node: yaml.Node) -> tuple[Factor, ...]:
    """The ``factors:`` mapping: each factor's name, its levels (a list of labels, or a
    mapping of labels to named values) and no level twice."""
    if is_null(node):
        raise node_error(node, "'factors' is empty; list at least one factor with its levels, "
                               "e.g. threads: [1, 2, 4]")
    items = mapping_items(node, "'factors'")
    if not items:
        raise node_error(node, "'factors' is empty; list at least one factor with its levels")
    factors = []
    for fname, knode, vnode in items:
        _check_factor_name(fname, knode)
        levels, lnodes = _parse_levels(fname, knode, vnode)
        _check_distinct_levels(fname, levels, lnodes)
        factors.append(Factor(fname, tuple(levels)))
    return tuple(factors)


def _check_factor_name(fname: str, knode: yaml.Node) -> None:
    """A factor name must not be a runs.csv column and must fit in a placeholder."""
    if fname in RESERVED_COLUMNS:
        raise node_error(knode, f"factor name {fname!r} is a column of runs.csv; rename "
                                f"the factor (e.g. {fname}_level)")
    if not fname.strip() or any(c in fname for c in "{}.,=") or fname != fname.strip():
        raise node_error(knode, f"factor name {fname!r} cannot be used in templates; use a "
                                "name without braces, dots, commas, '=' or edge spaces")


def _parse_levels(fname: str, knode: yaml.Node,
                  vnode: yaml.Node) -> tuple[list[Level], list[yaml.Node]]:
    """A factor's levels and the node of each (for error lines); at least one."""
    if isinstance(vnode, yaml.SequenceNode):
        levels, lnodes = _listed_levels(fname, vnode)
    elif isinstance(vnode, yaml.MappingNode):
        levels, lnodes = _named_levels(fname, vnode)
    elif is_null(vnode):
        raise node_error(knode, f"factor {fname!r} has no levels; list at least one, "
                                f"e.g. {fname}: [a, b]")
    else:
        raise node_error(vnode, f"factor {fname!r} must list its levels, e.g. "
                                f"{fname}: [a, b], not {kind(vnode)}")
    if not levels:
        raise node_error(vnode, f"factor {fname!r} has no levels; list at least one")
    return levels, lnodes


def _listed_levels(fname: str, vnode: yaml.SequenceNode) -> tuple[list[Level], list[yaml.Node]]:
    """Levels written as a list: each a single value, its label the source text."""
    levels: list[Level] = []
    for lnode in vnode.value:
        if not isinstance(lnode, yaml.ScalarNode) or is_null(lnode):
            raise node_error(lnode, f"a level of factor {fname!r} must be a single "
                                    f"value, not {kind(lnode)}; for named values "
                                    "write the levels as a mapping")
        levels.append(Level(lnode.value))
    return levels, vnode.value


def _named_levels(fname: str, vnode: yaml.MappingNode) -> tuple[list[Level], list[yaml.Node]]:
    """Levels written as a mapping: label → named values (each a single value)."""
    levels: list[Level] = []
    lnodes = []
    for label, lknode, lvnode in mapping_items(vnode, f"factor {fname!r}"):
        values: dict[str, str] = {}
        if not is_null(lvnode):
            for vname, vknode, vvnode in mapping_items(
                    lvnode, f"level {label!r} of factor {fname!r}"):
                if not isinstance(vvnode, yaml.ScalarNode) or is_null(vvnode):
                    raise node_error(vvnode, f"value {vname!r} of level {label!r} must "
                                             f"be a single value, not {kind(vvnode)}")
                values[vname] = vvnode.value
        levels.append(Level(label, values))
        lnodes.append(lknode)
    return levels, lnodes


def _check_distinct_levels(fname: str, levels: list[Level], lnodes: list[yaml.Node]) -> None:
    """Each level once."""
    seen: dict[str, yaml.Node] = {}
    for lv, ln in zip(levels, lnodes):
        if lv.label in seen:
            raise node_error(ln, f"factor {fname!r} lists the level {lv.label!r} twice "
                                 f"(also on line {seen[lv.label].start_mark.line + 1}); "
                                 "each level once")
        seen[lv.label] = ln


def _parse_command(node: yaml.Node, what: str, shell: bool) -> CommandTemplate:
    if is_null(node):
        raise node_error(node, f"{what} is empty; give a command, e.g. [./app, --flag]")
    if isinstance(node, yaml.SequenceNode):
        parts = []
        for item in node.value:
            if not isinstance(item, yaml.ScalarNode) or is_null(item):
                raise node_error(item, f"each argument of {what} must be a single value, not "
                                       f"{kind(item)}")
            parts.append(item.value)
        if not parts or not parts[0].strip():
            raise node_error(node, f"{what} is empty; give at least the program to run")
        return CommandTemplate(tuple(parts), shell=shell)
    text = scalar_text(node, what)
    if not text.strip():
        raise node_error(node, f"{what} is empty; give the command to run")
    if shell:
        return CommandTemplate((text,), shell=True)
    try:
        parts = shlex.split(text)
    except ValueError as exc:
        raise node_error(node, f"{what} cannot be split into arguments ({exc}); check the "
                               "quotes") from None
    if not parts:
        raise node_error(node, f"{what} is empty; give the command to run")
    return CommandTemplate(tuple(parts), shell=False)


def _template_nodes(node: yaml.Node) -> list[tuple[str, yaml.Node]]:
    out = []
    stack = [node]
    while stack:
        n = stack.pop()
        if isinstance(n, yaml.ScalarNode):
            if not is_null(n):
                out.append((n.value, n))
        elif isinstance(n, yaml.SequenceNode):
            stack.extend(n.value)
        elif isinstance(n, yaml.MappingNode):
            stack.extend(v for _k, v in n.value)
    return out

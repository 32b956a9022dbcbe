"""The command-line grammar's shared pieces: one spelling per concept (docs/cli.md).

Every subcommand declares its options through these helpers, so a concept is
spelled and read the same way everywhere:

* value types for argparse: `percent`, `ratio`, `duration`, `confidence`, `count`
  (reading through `benchharness.values`, one parser each);
* `alias`: an old spelling that shipped, kept working with a one-line
  deprecation note on stderr and hidden from ``--help``;
* `add_json` / `emit_json`: ``--json`` prints one JSON document to stdout and
  nothing else goes to stdout (the CLI sends every other line to stderr while the
  command runs); ``--json-out FILE`` writes the same document to FILE;
* `out_file`: an output FILE option; ``-`` is never created as a file;
* `examples`: the epilog every ``--help`` ends with;
* `GRAMMAR`: the concepts and their one spelling, which the grammar test
  (tests/test_cli_grammar.py) checks every parser against.

Standard library only: ``benchharness --help`` builds every parser.
"""

from __future__ import annotations

import argparse
import json
import os
import sys

from benchharness import values as V

#: concept -> (the one spelling, spellings that shipped and are deprecated). File keys
#: are checked by the modules that read the sections; options by the grammar test.
GRAMMAR: dict[str, tuple[str, tuple[str, ...]]] = {
    "JSON to stdout": ("--json", ()),
    "JSON to a file": ("--json-out", ()),
    "results folder to create": ("--out", ()),
    "confidence (significance = 100% - confidence)": ("--confidence",
                                                     ("--alpha", "--false-step-level")),
    "direction of better": ("--better", ("--higher-is-better", "--lower-is-better",
                                         "--direction")),
    "history database": ("--history-db", ("--history", "--db")),
    "gate: most pairs per workload": ("--max-pairs", ("--max-runs",)),
    "gate: pairs before the first look": ("--first-look-pairs", ("--min-runs",)),
    "warm-up runs": ("--warmup-runs", ("--warmup", "--warm-up", "--warmups")),
    "response column": ("--response", ("--metric",)),
    "factor columns of a CSV": ("--factors", ()),
    "earlier results for estimates": ("--pilot", ()),
    "time budget": ("--budget", ()),
    "seed of the run order": ("--seed", ()),
}

#: Metavariables of positional arguments and of option values, one per concept.
METAVARS = {
    "experiment file": "FILE",
    "results folder or tidy CSV": "SOURCE",
    "results folder": "FOLDER",
    "percentage": "PCT",
    "ratio": "RATIO",
    "duration": "DURATION",
}


def _type(fn, name):
    fn.__name__ = name  # argparse names the type in its own messages
    return fn


def percent(low: float | None = 0.0, high: float | None = 1.0, low_open: bool = False,
            high_open: bool = True):
    """argparse type: ``5%`` or ``0.05`` -> 0.05, inside [low, high)."""

    def parse(text: str) -> float:
        try:
            v = V.parse_percent(text)
        except V.ValueFormError as exc:
            raise argparse.ArgumentTypeError(str(exc)) from None
        if ((low is not None and (v < low or (low_open and v == low)))
                or (high is not None and (v > high or (high_open and v == high)))):
            lo = "" if low is None else f"{'above' if low_open else 'at least'} {low * 100:g}%"
            hi = "" if high is None else f"{'below' if high_open else 'at most'} {high * 100:g}%"
            raise argparse.ArgumentTypeError(
                f"{text!r} must be {' and '.join(s for s in (lo, hi) if s)}")
        return v

    return _type(parse, "percentage")


def confidence(text: str) -> float:
    """argparse type: a confidence level, ``95%`` or ``0.95`` (above 0%, below 100%)."""
    return percent(0.0, 1.0, low_open=True)(text)


confidence = _type(confidence, "confidence")


def complement(text: str) -> float:
    """A significance level (``0.05`` or ``5%``) as the confidence it leaves (0.95): the
    reading of the deprecated ``--alpha`` and ``--false-step-level``."""
    return round(1.0 - percent(0.0, 1.0, low_open=True, high_open=True)(text), 12)


def ratio(option: str, above_one: bool = True):
    """argparse type: ``1.05``, ``1.05x`` or ``5%`` -> 1.05 (above 1 when ``above_one``)."""

    def parse(text: str) -> float:
        try:
            v = V.parse_ratio(text, what=option)
        except V.ValueFormError as exc:
            raise argparse.ArgumentTypeError(str(exc)) from None
        if v <= 0 or (above_one and v <= 1):
            raise argparse.ArgumentTypeError(
                f"{text!r} must be a ratio above 1{'' if above_one else ' or below it'}, "
                "e.g. 5% or 1.05x")
        return v

    return _type(parse, "ratio")


def duration(text: str) -> float:
    """argparse type: a duration with its unit (``90s``, ``5m``, ``1h30m``) in seconds."""
    try:
        v = V.parse_duration(text)
    except V.ValueFormError as exc:
        raise argparse.ArgumentTypeError(str(exc)) from None
    if v <= 0:
        raise argparse.ArgumentTypeError(f"{text!r} must be a positive duration, e.g. 90s")
    return v


duration = _type(duration, "duration")


def count(minimum: int):
    """argparse type: a whole number of at least ``minimum``."""

    def parse(text: str) -> int:
        try:
            v = int(str(text).strip())
        except ValueError:
            raise argparse.ArgumentTypeError(f"{text!r} is not a whole number") from None
        if v < minimum:
            raise argparse.ArgumentTypeError(f"{text!r} must be at least {minimum}")
        return v

    return _type(parse, "count")


class _Alias(argparse.Action):
    """An old spelling: stores into the new option's dest and says so once on stderr."""

    def __init__(self, option_strings, dest, new: str = "", convert=None, **kw):
        super().__init__(option_strings, dest, help=argparse.SUPPRESS, **kw)
        self.new = new
        self.convert = convert

    def __call__(self, parser, namespace, values, option_string=None):
        value = values
        if self.convert is not None:
            try:
                value = self.convert(values)
            except (argparse.ArgumentTypeError, V.ValueFormError) as exc:
                raise argparse.ArgumentError(self, str(exc)) from None
        new = self.new(values, value) if callable(self.new) else self.new
        V.deprecated(f"{option_string} is deprecated; write {new}")
        setattr(namespace, self.dest, value)


def confidence_for(old: str):
    """The new spelling of an old significance option, for the value typed: ``--alpha
    0.01`` -> ``--confidence 99% (for --alpha 0.01)``, so the note never suggests another
    level than the one the user asked for."""

    def new(raw, confidence: float) -> str:
        return f"--confidence {round(100 * confidence, 9):g}% (for {old} {raw})"

    return new


def alias(p, old: str, new: str, dest: str, convert=None, flag: bool = False,
          metavar: str | None = None) -> None:
    """Keep the shipped spelling ``old`` working: it sets ``dest`` (through ``convert``)
    with a one-line deprecation note naming ``new`` (a string, or a function of the typed
    and the converted value giving it). Hidden from ``--help``."""
    p.add_argument(old, dest=dest, action=_Alias, new=new, convert=convert,
                   nargs=0 if flag else None, metavar=metavar, default=argparse.SUPPRESS)


def out_file(option: str, stdout_ok: bool = False):
    """argparse type of an output FILE: ``-`` means stdout where allowed, and is
    refused elsewhere, so no file named ``-`` is ever created."""

    def parse(text: str) -> str:
        if text == "-" and not stdout_ok:
            raise argparse.ArgumentTypeError(
                "'-' (standard output) is not accepted here; give a file path")
        if text == "":
            raise argparse.ArgumentTypeError("the path is empty; give a file path")
        return text

    return _type(parse, "path")


def source(text: str) -> str:
    """argparse type of a SOURCE (a results folder or a tidy CSV): an experiment file given
    there by mistake is refused at once, saying what to give instead (it was read as a CSV
    and refused for lacking --factors)."""
    if text.lower().endswith((".yaml", ".yml")) and os.path.isfile(text):
        raise argparse.ArgumentTypeError(
            f"{text} is an experiment file; give the results folder a run of it wrote "
            f"(`benchharness run {text}` makes one) or a tidy CSV")
    return text


source = _type(source, "source")


def add_json(p, what: str) -> None:
    """``--json`` (one JSON document on stdout, nothing else) and ``--json-out FILE``."""
    p.add_argument("--json", action="store_true",
                   help=f"print {what} as one JSON document on standard output (nothing "
                        "else goes there; notes and progress go to standard error)")
    p.add_argument("--json-out", metavar="FILE", type=out_file("--json-out", stdout_ok=True),
                   help=f"also write {what} as JSON to FILE ('-' is the same as --json)")


#: Where ``--json`` documents go: the real standard output, saved by the CLI before it
#: sends every other line of the command to standard error.
json_stream = None


def emit_json(args, text: str) -> None:
    """Deliver one JSON document as ``--json`` / ``--json-out`` ask."""
    if not text.endswith("\n"):
        text += "\n"
    if getattr(args, "json", False) or getattr(args, "json_out", None) == "-":
        stream = json_stream or sys.stdout
        stream.write(text)
        stream.flush()
    target = getattr(args, "json_out", None)
    if target and target != "-":
        write_file(target, text, "--json-out")


def wants_json_only(args) -> bool:
    """True when stdout must carry nothing but the JSON document."""
    return bool(getattr(args, "json", False) or getattr(args, "json_out", None) == "-")


def write_file(path: str, text: str, option: str) -> None:
    """Write an output file whole (a sibling, then a rename: a full disk leaves the old
    file, never half a new one); a bad path is one line (exit 2), a full disk exit 75."""
    from benchharness.errors import UsageError, disk_full_writing, is_disk_full

    from pathlib import Path

    tmp = Path(f"{path}.tmp{os.getpid()}")
    try:
        tmp.write_text(text, encoding="utf-8")
        os.replace(tmp, path)
    except OSError as exc:
        try:
            os.unlink(tmp)
        except OSError:
            pass
        if is_disk_full(exc):
            raise disk_full_writing(path) from None
        raise UsageError(f"{option} {path}: cannot write ({exc.strerror or exc})") from None


def examples(*lines: str) -> str:
    """The epilog of a ``--help``: real command lines, each with what it does."""
    out = ["examples:"]
    for line in lines:
        cmd, _, why = line.partition("  # ")
        out.append(f"  {cmd}")
        if why:
            out.append(f"      {why}")
    return "\n".join(out)


def dumps(data) -> str:
    """The JSON text every command emits (no NaN: a missing number is null)."""
    return json.dumps(_finite(data), indent=1, allow_nan=False, default=str)


def _finite(x):
    import math

    if isinstance(x, float) and not math.isfinite(x):
        return None
    if isinstance(x, dict):
        return {k: _finite(v) for k, v in x.items()}
    if isinstance(x, (list, tuple)):
        return [_finite(v) for v in x]
    return x

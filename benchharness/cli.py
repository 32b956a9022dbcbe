"""The `benchharness` command: parse arguments, call the library, print, exit.

Each subcommand lives in `benchharness/commands/<name>.py` and exposes
``add_parser(subparsers)`` (declare its options; set ``func``) and does its work
through the library. This module stays thin and imports no heavy library, so
``benchharness --help`` and ``benchharness plan`` stay instant.

Exit codes (DESIGN.md): 0 success, 1 a verdict that should fail CI, 2 bad input
or usage (one line on stderr, no traceback), 3 inconclusive where asked, 130
after Ctrl-C, 70 for an internal error (a bug), so that it is never read as a verdict,
75 when the disk is full (what was recorded is kept; free space and resume).
"""

from __future__ import annotations

import argparse
import contextlib
import difflib
import importlib
import re
import sys

from benchharness.errors import BenchharnessError

# (subcommand name, module under benchharness.commands). Order is the order
# shown by --help.
COMMANDS: list[tuple[str, str]] = [
    ("plan", "plan"),
    ("run", "run"),
    ("analyze", "analyze"),
    ("report", "report"),
    ("choose", "choose"),
    ("gate", "gate"),
    ("size", "size"),
    ("compare", "compare"),
    ("history", "history"),
    ("host", "host"),
    ("steady", "steady"),
]


class _Formatter(argparse.HelpFormatter):
    """Wraps prose paragraphs, keeps indented lines (the examples) as written."""

    def _fill_text(self, text, width, indent):
        out, para = [], []

        def flush():
            if para:
                out.append(super(_Formatter, self)._fill_text(" ".join(para), width, indent))
                para.clear()

        for line in text.splitlines():
            if not line.strip():
                flush()
                out.append("")
            elif line.startswith(" ") or line.endswith(":"):
                flush()
                out.append(indent + line)
            else:
                para.append(line)
        flush()
        return "\n".join(out)


class _Parser(argparse.ArgumentParser):
    """argparse that reports usage errors as one line and exit code 2, pointing at the
    help of the command that was meant, with the nearest command for a misspelt one."""

    def __init__(self, *args, **kwargs):
        kwargs.setdefault("formatter_class", _Formatter)
        super().__init__(*args, **kwargs)

    def error(self, message: str):  # pragma: no cover - exercised via CLI tests
        m = re.search(r"invalid choice: '([^']*)'", message)
        sub = _subcommands(self)
        if m and sub is not None:
            word = m.group(1)
            what = "command" if self.prog == "benchharness" else "action"
            near = difflib.get_close_matches(word, list(sub.choices), n=1, cutoff=0.5)
            hint = f"; did you mean {near[0]}?" if near else \
                f"; the {what}s are {', '.join(sub.choices)}"
            message = f"unknown {what} {word!r}{hint}"
        self.exit(2, f"{self.prog}: {message} (see `{self.prog} --help`)\n")


def _subcommands(parser):
    for action in parser._actions:
        if isinstance(action, argparse._SubParsersAction):
            return action
    return None


def _mark_parsers(parser) -> None:
    """Each (sub)command parser records itself, so an unknown option can be reported
    against the command it was given to."""
    sub = _subcommands(parser)
    if sub is None:
        return
    for child in sub.choices.values():
        child.set_defaults(_cmd_parser=child)
        if child.formatter_class is argparse.HelpFormatter:
            child.formatter_class = _Formatter
        _mark_parsers(child)


def build_parser() -> argparse.ArgumentParser:
    from benchharness import __version__

    parser = _Parser(
        prog="benchharness",
        description="Plan, run and analyse benchmark experiments as designed "
                    "factorial experiments. The grammar every command follows (options, "
                    "values, --json, exit codes) is in docs/cli.md.",
        epilog="examples:\n"
               "  benchharness plan experiments/archive-codecs.yaml\n"
               "      show what the demo experiment will run, without running it\n"
               "  benchharness run experiments/archive-codecs.yaml\n"
               "      run it into a results folder, analyse it and write the reports\n"
               "  benchharness analyze results/example-archive-codecs --json\n"
               "      the analysis of a results folder as one JSON document\n"
               "\n"
               "`benchharness COMMAND --help` describes a command.",
    )
    parser.add_argument("--version", action="version", version=f"benchharness {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    for _name, module in COMMANDS:
        try:
            mod = importlib.import_module(f"benchharness.commands.{module}")
        except ModuleNotFoundError as exc:
            if exc.name == f"benchharness.commands.{module}":
                continue  # a capability not present in this build
            raise
        mod.add_parser(sub)
    _mark_parsers(parser)
    return parser


#: Commands whose ``--json`` once took a FILE; ``--json out.json`` and ``--json -`` still
#: work there, with a deprecation note (the one meaning now: ``--json-out FILE``).
_JSON_FILE_ONCE = ("analyze", "choose", "gate", "compare", "history")


def _legacy_json(argv: list[str]) -> list[str]:
    from benchharness.values import deprecated

    words = [a for a in argv if not a.startswith("-")]
    if not words or words[0] not in _JSON_FILE_ONCE:
        return argv
    out, i = [], 0
    while i < len(argv):
        a = argv[i]
        if a == "--":
            out.extend(argv[i:])
            break
        value = None
        if a.startswith("--json="):
            value = a[len("--json="):]
        elif a == "--json" and i + 1 < len(argv) and (argv[i + 1] == "-" or (
                argv[i + 1].endswith(".json") and not argv[i + 1].startswith("-"))):
            value = argv[i + 1]
            i += 1
        if value is None:
            out.append(a)
        elif value == "-":
            deprecated("--json - is deprecated; write --json (it prints the JSON to standard "
                       "output)")
            out.append("--json")
        else:
            deprecated(f"--json FILE is deprecated; write --json-out {value} (--json alone "
                       "prints the JSON to standard output)")
            out.extend(["--json-out", value])
        i += 1
    return out


def _unknown(args, extras: list[str], parser) -> int:
    """One line for words no option took, with the nearest option of that command."""
    p = getattr(args, "_cmd_parser", None) or parser
    options = sorted({s for a in p._actions for s in a.option_strings
                      if a.help is not argparse.SUPPRESS
                      and not isinstance(a, argparse._HelpAction)})  # never "--help?"
    word = next((e for e in extras if e.startswith("-")), extras[0])
    if word.startswith("-"):
        name = word.split("=", 1)[0]
        # compared without the dashes they all share, so --html is not "near" --model
        bare = {o.lstrip("-"): o for o in options}
        near = difflib.get_close_matches(name.lstrip("-"), list(bare), n=1, cutoff=0.7)
        hint = f"; did you mean {bare[near[0]]}?" if near else ""
        msg = f"unknown option {name}{hint}"
    else:
        msg = f"unexpected argument {word!r}"
        if getattr(args, "json", False):
            msg += ("; if it names a file for --json, write --json-out FILE (--json alone "
                    "prints the JSON to standard output)")
    print(f"{p.prog}: {msg} (see `{p.prog} --help`)", file=sys.stderr)
    return 2


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    argv = _legacy_json(list(sys.argv[1:] if argv is None else argv))
    args, extras = parser.parse_known_args(argv)
    if extras:
        return _unknown(args, extras, parser)
    if not getattr(args, "func", None):
        parser.print_help(sys.stderr)   # a usage error (exit 2): standard error, like every one
        return 2
    try:
        if getattr(args, "json", False) or getattr(args, "json_out", None) == "-":
            # stdout carries the JSON document only: every other line goes to stderr
            from benchharness.commands import options

            options.json_stream = sys.stdout
            try:
                with contextlib.redirect_stdout(sys.stderr):
                    return int(args.func(args) or 0)
            finally:
                options.json_stream = None
        return int(args.func(args) or 0)
    except BenchharnessError as exc:
        print(_error_line(exc, args), file=sys.stderr)
        return int(getattr(exc, "exit_code", 2))
    except KeyboardInterrupt:
        print("benchharness: interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:
        return 0
    except OSError as exc:
        from benchharness.errors import DISK_FULL_EXIT, is_disk_full

        if not is_disk_full(exc):
            return _internal_error()
        where = f" writing {exc.filename}" if exc.filename else ""
        print(f"benchharness: the disk is full (no space left on the device{where}); "
              "free some space and run the command again", file=sys.stderr)
        return DISK_FULL_EXIT
    except Exception:  # noqa: BLE001 - a bug, not a verdict: never exit 1 (a regression)
        return _internal_error()


#: ``FILE:LINE:`` or ``FILE:LINE:COL:`` at the start of a message: an error inside a file
_LOCATED = re.compile(r"^[^\s:][^:]*:\d+(?::\d+)?: ")


def _error_line(exc: BenchharnessError, args) -> str:
    """The one line for an error the command raised after its arguments were read.

    An error about what was asked (a value the command refuses, a missing file, a folder
    that is not a results folder) names the command and points at its own ``--help``, as
    argparse's errors do; an error inside a file points at ``FILE:LINE:COL`` instead, and
    a failure of the machine or the run (a full disk, a command that cannot start) at
    neither.
    """
    from benchharness.errors import DiskFullError, ExecutionError, ExperimentError

    text = str(exc)
    p = getattr(args, "_cmd_parser", None)
    inside_file = _LOCATED.match(text) or (isinstance(exc, ExperimentError)
                                           and exc.line is not None)
    if (p is None or inside_file or isinstance(exc, (DiskFullError, ExecutionError))
            or getattr(exc, "exit_code", 2) != 2):
        return f"benchharness: {text}"
    return f"{p.prog}: {text} (see `{p.prog} --help`)"


def _internal_error() -> int:
    import traceback

    traceback.print_exc()
    print("benchharness: internal error (this is a bug in benchharness, not a verdict "
          "about your software); the traceback above helps to report it", file=sys.stderr)
    return 70

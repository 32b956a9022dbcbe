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
import importlib
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


class _Parser(argparse.ArgumentParser):
    """argparse that reports usage errors as one line and exit code 2."""

    def error(self, message: str):  # pragma: no cover - exercised via CLI tests
        self.exit(2, f"benchharness: {message} (see `{self.prog} --help`)\n")


def build_parser() -> argparse.ArgumentParser:
    from benchharness import __version__

    parser = _Parser(
        prog="benchharness",
        description="Plan, run and analyse benchmark experiments as designed "
                    "factorial experiments.",
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
    return parser


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "func", None):
        parser.print_help()
        return 2
    try:
        return int(args.func(args) or 0)
    except BenchharnessError as exc:
        print(f"benchharness: {exc}", file=sys.stderr)
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


def _internal_error() -> int:
    import traceback

    traceback.print_exc()
    print("benchharness: internal error (this is a bug in benchharness, not a verdict "
          "about your software); the traceback above helps to report it", file=sys.stderr)
    return 70

"""`benchharness choose SOURCE`: recommend a default setting with statistical backing.

Thin: parse options, call `benchharness.choose.choose`, print plain text,
optionally write the JSON. See docs/choose.md.
"""

from __future__ import annotations

import json
import math
from pathlib import Path

from benchharness.errors import UsageError


def add_parser(subparsers):
    p = subparsers.add_parser(
        "choose",
        help="recommend a default: the best or tied settings, robust across environments",
        description="Recommend a default setting from a results folder or a tidy CSV: the "
                    "settings that cannot be told apart from the best, the setting that holds "
                    "up across environments, and (with --also) the trade-off front. Options "
                    "left out are taken from the experiment file's choose: section.",
    )
    p.add_argument("source", metavar="SOURCE", help="results folder or tidy CSV of runs")
    p.add_argument("--response", default=None,
                   help="response column to choose on (default: choose.response or wall_s)")
    p.add_argument("--factors", default=None, metavar="A,B",
                   help="factor columns (needed for a CSV without an experiment file)")
    p.add_argument("--across", default=None, metavar="F,...",
                   help="environment columns the default must live with (not choices); "
                        "'' for none even if the experiment file names some")
    p.add_argument("--also", default=None, metavar="METRIC,...",
                   help="further responses for the trade-off front, e.g. max_rss_kib; '' for none")
    p.add_argument("--within", default=None, metavar="P%",
                   help="practical margin of the trade-off front: a difference smaller than "
                        "this does not count (default: choose.within or 3%%)")
    p.add_argument("--limit", action="append", default=None, metavar="'RESPONSE within P%'",
                   help="choose only among settings whose RESPONSE is within P%% of the best "
                        "setting's, e.g. --limit 'max_rss_kib within 5%%' (repeatable)")
    p.add_argument("--setting", default=None, metavar="F,...",
                   help="factors that are settings (chosen); overrides the file's roles:")
    p.add_argument("--workload", default=None, metavar="F,...",
                   help="factors that are workloads (input kind, size): never chosen, the "
                        "choice must hold up across them")
    p.add_argument("--environment", default=None, metavar="F,...",
                   help="factors that are environments (machine, runtime): never chosen")
    p.add_argument("--confidence", default=None, type=float,
                   help="confidence level, between 0 and 1 (default 0.95)")
    p.add_argument("--prefer", action="append", default=[], metavar="FACTOR=LEVEL",
                   help="current default of a factor; ties go its way (repeatable)")
    p.add_argument("--better", choices=("lower", "higher"), default=None,
                   help="direction of the response (default: metrics: section, else lower)")
    g = p.add_mutually_exclusive_group()
    g.add_argument("--block", default=None, metavar="COL",
                   help="block column fitted as an additive noise term (default: 'block' for "
                        "blocked experiments, 'host' when runs span several hosts)")
    g.add_argument("--no-block", action="store_true", help="fit no block term")
    p.add_argument("--json", default=None, metavar="FILE",
                   help="also write the choice as JSON to FILE ('-' for standard output only)")
    p.set_defaults(func=run)
    return p


def _prefer(items) -> dict | None:
    out = {}
    for item in items:
        for part in item.split(","):
            part = part.strip()
            if not part:
                continue
            if "=" not in part:
                raise UsageError(f"--prefer {part!r}: expected FACTOR=LEVEL, e.g. threads=4")
            k, v = part.split("=", 1)
            if not k.strip():
                raise UsageError(f"--prefer {part!r}: the factor name is empty")
            out[k.strip()] = v.strip()
    return out or None


def _roles(args):
    """Roles given on the command line (merged over the experiment file's by `choose`)."""
    given = {r: getattr(args, r) for r in ("setting", "workload", "environment")
             if getattr(args, r) is not None}
    return given or None


def _finite(x):
    if isinstance(x, float) and not math.isfinite(x):
        return None
    if isinstance(x, dict):
        return {k: _finite(v) for k, v in x.items()}
    if isinstance(x, list):
        return [_finite(v) for v in x]
    return x


def run(args) -> int:
    from benchharness.choose import choose
    from benchharness.choose.render import terminal_text

    if args.confidence is not None and not 0 < args.confidence < 1:
        raise UsageError(f"--confidence {args.confidence}: must be between 0 and 1, e.g. 0.95")
    choice = choose(
        args.source,
        response=args.response,
        factors=args.factors,
        across=args.across,   # None: from the choose: section; "": none
        also=args.also,
        confidence=args.confidence,
        prefer=_prefer(args.prefer),
        better=args.better,
        block=False if args.no_block else args.block,
        roles=_roles(args),
        within=args.within,
        limits=args.limit,
    )
    data = json.dumps(_finite(choice.to_dict()), indent=2, allow_nan=False)
    if args.json == "-":
        print(data)
        return 0
    print(terminal_text(choice), end="")
    if args.json:
        target = Path(args.json)
        tmp = target.with_name(target.name + ".tmp")
        try:  # via a sibling and a rename: a full disk leaves the old file, never half one
            tmp.write_text(data + "\n", encoding="utf-8")
            tmp.replace(target)
        except OSError as exc:
            tmp.unlink(missing_ok=True)
            from benchharness.errors import disk_full_writing, is_disk_full

            if is_disk_full(exc):
                raise disk_full_writing(args.json) from None
            raise UsageError(f"--json {args.json}: cannot write ({exc.strerror})") from None
    return 0

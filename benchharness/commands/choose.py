"""`benchharness choose SOURCE`: recommend a default setting with statistical backing.

Thin: parse options, call `benchharness.choose.choose`, print plain text,
optionally write the JSON. See docs/choose.md.
"""

from __future__ import annotations

import json
import math

from benchharness.errors import UsageError


def add_parser(subparsers):
    from benchharness.commands import options as O

    p = subparsers.add_parser(
        "choose",
        help="recommend a default: the best or tied settings, robust across workloads and "
             "environments",
        description="Recommend a default setting from a results folder or a tidy CSV: the "
                    "settings that cannot be told apart from the best, the setting that holds "
                    "up across the workloads and environments, and (with --also) the trade-off front. Options "
                    "left out are taken from the experiment file's choose: section.",
        epilog=O.examples(
            "benchharness choose results/example-archive-codecs  # the best or tied settings, "
            "holding up across the workloads",
            "benchharness choose results/example-archive-codecs --also max_rss_kib --limit "
            "'max_rss_kib within 5%'  # fastest among settings whose memory is within 5% of "
            "the smallest",
            "benchharness choose results/example-archive-codecs --json  # the choice as one "
            "JSON document"),
    )
    p.add_argument("source", metavar="SOURCE", type=O.source,
                   help="results folder or tidy CSV of runs")
    p.add_argument("--response", default=None, metavar="NAME",
                   help="response column to choose on (default: choose.response, else the file's "
                        "response:, else wall_s)")
    p.add_argument("--factors", default=None, metavar="A,B",
                   help="factor columns (needed for a CSV without an experiment file)")
    p.add_argument("--across", default=None, metavar="F,...",
                   help="further columns whose levels are conditions the default must live with "
                        "(workloads, environments; never chosen); "
                        "'' for none even if the experiment file names some")
    p.add_argument("--also", default=None, metavar="METRIC,...",
                   help="further responses for the trade-off front, e.g. max_rss_kib; '' for none")
    p.add_argument("--within", default=None, metavar="PCT", type=O.percent(0.0, 1.0),
                   help="practical margin of the trade-off front: a difference smaller than "
                        "this does not count (default: choose.within or 3%%)")
    p.add_argument("--limit", action="append", default=None, metavar="'NAME within PCT'",
                   help="choose only among settings whose response NAME is within PCT of the "
                        "best setting's, e.g. --limit 'max_rss_kib within 5%%' (repeatable)")
    p.add_argument("--setting", default=None, metavar="F,...",
                   help="factors that are settings (chosen); overrides the file's roles:")
    p.add_argument("--workload", default=None, metavar="F,...",
                   help="factors that are workloads (input kind, size): never chosen, the "
                        "choice must hold up across them")
    p.add_argument("--environment", default=None, metavar="F,...",
                   help="factors that are environments (machine, runtime): never chosen")
    p.add_argument("--confidence", default=None, type=O.confidence, metavar="PCT",
                   help="confidence level (default: choose.confidence or 95%%)")
    p.add_argument("--prefer", action="append", default=[], metavar="FACTOR=LEVEL",
                   help="current default of a factor; ties go its way (repeatable)")
    p.add_argument("--better", choices=("lower", "higher"), default=None,
                   help="direction of the response (default: metrics: section, else lower)")
    g = p.add_mutually_exclusive_group()
    g.add_argument("--block", default=None, metavar="COL",
                   help="block column fitted as an additive noise term (default: 'block' for "
                        "blocked experiments, 'host' when runs span several hosts)")
    g.add_argument("--no-block", action="store_true", help="fit no block term")
    O.add_json(p, "the choice")
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
    from benchharness.report.units import declare_folder_units

    declare_folder_units(args.source)   # a metric's declared unit, printed as declared
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
    if args.json or args.json_out:
        from benchharness.commands.options import emit_json, wants_json_only

        emit_json(args, json.dumps(_finite(choice.to_dict()), indent=2, allow_nan=False))
        if wants_json_only(args):
            return 0
    print(terminal_text(choice), end="")
    return 0

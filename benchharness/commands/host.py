"""`benchharness host`: this machine's facts and what may disturb benchmarks on it."""

from __future__ import annotations

import json
import sys

from benchharness.numbers import MISSING


def add_parser(sub) -> None:
    from benchharness.commands import options as O

    p = sub.add_parser("host", help="show machine facts and noise warnings",
                       description="Show the facts benchharness records about this machine and "
                                   "check for conditions that disturb timings (load, busy "
                                   "processes, frequency scaling, boost, throttling, memory "
                                   "pressure, battery, virtualization), each with a fix. "
                                   "Warnings and notes go to standard error.",
                       epilog=O.examples(
                           "benchharness host  # the facts, then what may disturb timings here",
                           "benchharness host --strict  # exit 1 when a check warns (a CI "
                           "runner that should be quiet)",
                           "benchharness host --json  # {facts, warnings} as one JSON document"))
    O.add_json(p, "{facts, warnings}")
    p.add_argument("--strict", action="store_true",
                   help="exit with code 1 when any check gives a warning (notes do not count)")
    p.set_defaults(func=main)


def _fmt(v) -> str:
    if v is None:
        return "not exposed"
    if isinstance(v, bool):
        return "yes" if v else "no"
    if isinstance(v, dict):
        return ", ".join(f"{k} {_fmt(x)}" for k, x in v.items()) or MISSING
    if isinstance(v, list):   # load averages alike: "1.86, 0.95, 1.22", not "1.86, 0.949, 1.216"
        return ", ".join(f"{x:.2f}" if isinstance(x, float) else _fmt(x) for x in v) or MISSING
    return str(v)


def main(args) -> int:
    from benchharness.measure.host import check_host, collect_facts

    facts = collect_facts()
    warnings = check_host(facts)
    from benchharness.commands.options import emit_json, wants_json_only

    if args.json or args.json_out:
        emit_json(args, json.dumps({"facts": facts, "warnings": warnings}, indent=1,
                                   default=str))
    if not wants_json_only(args):
        gib = (facts.get("memory_bytes") or 0) / 2**30
        lines = [
            ("CPU", f"{facts.get('cpu_model') or 'unknown'} ({facts.get('physical_cores')} "
                    f"physical / {facts.get('logical_cores')} logical cores)"),
            ("memory", f"{gib:.1f} GiB"),
            ("system", f"{facts.get('os_release') or facts.get('os')}, kernel "
                       f"{facts.get('kernel')}, {facts.get('machine')}"),
            ("Python", f"{facts.get('python')} ({facts.get('python_implementation')})"),
            ("load average", _fmt(facts.get("load_average_start"))),
            ("CPU MHz now", _fmt(facts.get("cpu_mhz_now"))),
            ("governor", _fmt(facts.get("frequency_governor"))),
            ("boost", _fmt((facts.get("boost") or {}).get("enabled")
                           if facts.get("boost") else None)),
            ("throttle events", _fmt(facts.get("thermal_throttle_counts"))),
            ("virtualization", facts.get("virtualization") or "none detected"),
            ("battery", _fmt(facts.get("battery")) if facts.get("battery") else "none"),
        ]
        width = max(len(k) for k, _ in lines)
        for k, v in lines:
            print(f"{k:<{width}}  {v}")
        if not warnings:
            print("\nno conditions found that are known to disturb timings")
        for w in warnings:  # warnings and notes: standard error, like every command's
            # one line each, as `run` says them: "warning: MESSAGE; fix: FIX"
            print(f"{w['severity']}: {w['message']}; fix: {w['fix']}", file=sys.stderr)
    if args.strict and any(w["severity"] == "warning" for w in warnings):
        return 1
    return 0

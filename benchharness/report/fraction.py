"""The report's section on a two-level fraction: its alias chains, their effects, the margins.

Rendered from ``analysis["fraction"]`` (`benchharness.analysis.fraction`), never
re-fitted: the design and its defining relation (Box & Hunter 1961), the
effect of every alias chain with its interval and verdict, and how the verdict
was reached (t tests on the replicates, or Lenth's 1989 pseudo standard error
when there are none). The half-normal plot (Daniel 1959) is drawn by
`benchharness.report.figures.half_normal_plot`. Returns plain strings and
lists; the HTML and Markdown templates lay them out.
"""

from __future__ import annotations

from benchharness.report.data import ReportData, finite
from benchharness.report.units import (
    fmt_interval, fmt_num, fmt_p, fmt_ratio, fmt_ratio_interval,
)

COLUMNS = ("alias chain", "letters", "effect", "ratio", "interval", "p", "verdict")


def _roman(r) -> str:
    from benchharness.design.fractional import roman

    try:
        return roman(int(r))
    except (TypeError, ValueError):
        return "–"


def _design_sentence(fr: dict) -> str:
    """What design was run and what it aliases."""
    if fr.get("defining_relation"):
        return (
            f"A {fr.get('design')} fractional design of resolution {_roman(fr.get('resolution'))} "
            f"({fr.get('runs_used')} runs analysed): defining relation I = "
            + " = ".join(fr["defining_relation"])
            + (f", from the generators {', '.join(fr['generators'])}" if fr.get("generators")
               else "")
            + ". Effects whose product is a word of that relation cannot be told apart: each "
              "row below estimates a whole alias chain, named by its lowest-order member.")
    return (f"A full {fr.get('design')} two-level design run once per cell "
            f"({fr.get('runs_used')} runs): nothing is aliased, but there are no "
            "replicates to measure the noise with.")


def _noise_sentence(fr: dict, alpha) -> str | None:
    """How the chains were judged: Lenth's margins without replicates, else Holm-adjusted
    tests against the residual."""
    ln = fr.get("lenth")
    if ln:
        return (
            f"No replicates, so the noise is judged from the effects themselves (Lenth 1989): "
            f"the pseudo standard error {fmt_num(ln.get('pse'), 3)} is computed from the "
            f"smaller effects; a chain beyond the margin of error {fmt_num(ln.get('me'), 3)} is "
            f"likely active (p < {1 - float(ln.get('level') or 0.95):g} on its own), beyond "
            f"the simultaneous margin {fmt_num(ln.get('sme'), 3)} active even allowing for the "
            f"{len(fr['effects'])} chains looked at.")
    if fr.get("residual_df"):
        return (
            f"Each chain is tested against the replicates' residual ({fr['residual_df']} "
            f"degrees of freedom); active means a Holm-adjusted p below {alpha:g} over all "
            f"{len(fr['effects'])} chains.")
    return None


def _chain_verdict(e: dict) -> str:
    """active, likely (beyond Lenth's margin of error), or nothing."""
    if e.get("active"):
        return "active"
    if e.get("likely"):
        return "likely (beyond the margin of error)"
    return ""


def _chain_interval(e: dict, log: bool) -> str:
    """The chain's interval: as ratios on the log scale, else on the analysis scale."""
    if log and finite(e.get("ratio_low")) and finite(e.get("ratio_high")):
        return fmt_ratio_interval(e["ratio_low"], e["ratio_high"])
    if finite(e.get("ci_low")) and finite(e.get("ci_high")):
        return fmt_interval(e["ci_low"], e["ci_high"])
    return "–"


def _chain_table_row(e: dict, log: bool, verdict: str) -> dict:
    """One row of the chains table."""
    p = fmt_p(e.get("p")) if finite(e.get("p")) else "–"
    if finite(e.get("p_holm")):
        p += f" (Holm {fmt_p(e['p_holm'])})"
    return {"cells": [e.get("chain") or e.get("term"), e.get("label") or "",
                      fmt_num(e.get("estimate"), 3),
                      fmt_ratio(e.get("ratio")) if log else "–", _chain_interval(e, log), p,
                      verdict],
            "significant": bool(verdict)}


def _found_sentence(active: list, likely: list) -> str:
    """Which chains stand out, in one sentence."""
    found = []
    if active:
        found.append("Active: " + "; ".join(active) + ".")
    if likely:
        found.append("Likely active (beyond the margin of error, not the simultaneous "
                     "margin): " + "; ".join(likely) + ".")
    return " ".join(found) if found else "No chain stands out from the noise."


def section(data: ReportData) -> dict | None:
    """``{summary: [...], columns, rows: [[...]], active: [...]}`` or None without a fraction."""
    fr = data.analysis.get("fraction")
    if not isinstance(fr, dict) or not fr.get("effects"):
        return None
    alpha = fr.get("alpha") or data.alpha
    log = fr.get("scale") == "log"
    letters = ", ".join(f"{k} = {v}" for k, v in (fr.get("letters") or {}).items())
    summary = [_design_sentence(fr)]
    if letters:
        summary.append(f"Letters: {letters}.")
    noise = _noise_sentence(fr, alpha)
    if noise is not None:
        summary.append(noise)
    summary.append(
        "An effect is the mean at a factor's second level minus the mean at its first, on the "
        + ("log scale, so its ratio is second level over first (a chain of two factors: "
           "runs where both are at the same level over runs where they differ)."
           if log else "analysis scale."))
    if fr.get("confounded_with_blocks"):
        summary.append("Confounded with blocks (not estimated): "
                       + ", ".join(fr["confounded_with_blocks"]) + ".")
    rows, active, likely = [], [], []
    effects = sorted(fr["effects"], key=lambda e: -abs(float(e.get("estimate") or 0.0)))
    for e in effects:
        verdict = _chain_verdict(e)
        if verdict:
            (active if e.get("active") else likely).append(e.get("chain") or e.get("label"))
        rows.append(_chain_table_row(e, log, verdict))
    summary.insert(1, _found_sentence(active, likely))
    return {"summary": summary, "columns": list(COLUMNS), "rows": rows, "active": active,
            "likely": likely}

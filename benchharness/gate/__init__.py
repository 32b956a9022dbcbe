"""The CI regression gate: is the candidate slower than the baseline beyond a tolerance?

Interleaved blocks of baseline and candidate runs, judged after every block
with repeated one-sided confidence bounds from group-sequential alpha spending
(Lan & DeMets 1983, O'Brien-Fleming-type spending function), Bonferroni across
workloads. Modules: `sequential` (boundaries and spending), `decide` (the
verdict of one workload), `orchestrate` (the run loop), `session` (experiment
file, results folder), `output` (terminal, Markdown, JUnit XML, JSON).

Python use::

    from benchharness.gate.decide import GateSettings
    from benchharness.gate.orchestrate import run_gate
    outcome = run_gate(workloads, make_spec, executor, GateSettings(tolerance=0.05))
    outcome.verdict, outcome.exit_code()
"""

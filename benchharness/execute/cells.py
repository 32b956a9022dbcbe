"""Each cell's rendered commands, environment and noise controls, and the `RunSpec` of a run.

A cell (one combination of levels) renders its command, environment, working
directory, untimed steps (build, reset, teardown) and noise controls once;
every run of it reuses that. The run engine, the gate and the cluster
coordinator all take their commands from here, so a command is rendered the
same way wherever it runs.
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import Mapping

from benchharness.execute.base import RunSpec

STEPS = ("build", "reset", "teardown")


class CellCache:
    """Rendered command, environment and steps per cell (computed once per cell).

    ``get(levels)`` returns a plain dict: ``argv``/``shell`` (the command),
    ``env`` (the child's whole environment), ``env_over`` (what the experiment
    sets), ``cwd``, ``cpus``, ``nice``, ``no_aslr``, ``label`` and, for each
    of ``build``, ``reset``, ``teardown``, an ``(argv, shell)`` pair or None.
    """

    def __init__(self, exp, session: Mapping):
        from benchharness.execute.controls import parse_controls

        self.exp = exp
        self.factor_names = tuple(exp.factor_names)
        self.cache: dict[tuple, dict] = {}
        self.envs: dict[tuple, dict] = {}
        self.controls = parse_controls(exp)
        if self.controls.clean_env:
            from benchharness.execute.envs import clean_environment

            self.base_env = clean_environment(os.environ)
        else:
            self.base_env = dict(os.environ)
        self.exp_dir = session.get("experiment_dir") or os.getcwd()
        self.cwd = session.get("cwd") or os.getcwd()

    def get(self, levels: Mapping[str, str]) -> dict:
        key = tuple([levels[f] for f in self.factor_names])
        c = self.cache.get(key)
        if c is None:
            c = self.cache[key] = self._render(levels)
        return c

    def _env_for(self, env_over: Mapping[str, str]) -> dict:
        """One shared environment per distinct set of templated variables (never a copy
        per cell: a plan of 100,000 cells would hold 100,000 environments)."""
        k = tuple(env_over.items())
        env = self.envs.get(k)
        if env is None:
            env = self.envs[k] = {**self.base_env, **env_over}
        return env

    def _render(self, levels: Mapping[str, str]) -> dict:
        from benchharness.execute.controls import resolve_cell

        exp = self.exp
        lookup = exp.lookup(levels)     # once per cell, for every template of it
        env_over = exp.render_env(levels, lookup)
        env = self._env_for(env_over)
        wd = exp.render_workdir(levels, lookup)
        cwd = self.cwd if wd is None else str(Path(self.exp_dir, wd))
        argv, shell = exp.render_command(exp.command, levels, lookup)
        ctl = resolve_cell(exp, self.controls, levels)
        c = {"cpus": ctl["cpus"], "nice": ctl["nice"], "no_aslr": self.controls.aslr_off,
             "argv": argv, "shell": shell, "env": env, "env_over": env_over, "cwd": cwd,
             "label": " ".join(f"{k}={v}" for k, v in levels.items())}
        for step in STEPS:
            t = getattr(exp, step)
            c[step] = exp.render_command(t, levels, lookup) if t is not None else None
        return c


def run_spec(argv_shell, c: Mapping, timeout_s, run_id=None, levels=None, env=None,
             inflight_path=None) -> RunSpec:
    """The `RunSpec` of one command of cell ``c`` (its main command or a step)."""
    argv, shell = argv_shell
    return RunSpec(argv=argv, shell_command=shell, env=env or c["env"], cwd=c["cwd"],
                   timeout_s=timeout_s, run_id=run_id, levels=levels or {},
                   cpus=c["cpus"], nice=c["nice"], no_aslr=c["no_aslr"],
                   inflight_path=inflight_path)


def build_key(c: Mapping) -> tuple:
    """What makes two builds the same: the rendered step, directory and environment."""
    return (c["build"], c["cwd"], tuple(sorted(c["env_over"].items())))

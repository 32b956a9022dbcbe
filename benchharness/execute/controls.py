"""Noise controls named in the experiment file, validated and applied per run.

Keys (top level of the experiment file):

* ``pin: "0-1"`` — CPU affinity of every run, in the kernel's list syntax;
  templated, so core count can be a factor (``pin: "{cores.cpus}"``). CPUs that
  do not exist are an error before the first run.
* ``nice: 5`` — niceness of every run (templated).
* ``clean_env: true`` — run with a minimal fixed environment instead of the
  harness's own (plus the file's ``env``).
* ``pad_env: true`` — add a variable of random length (0–4096 bytes) to every
  run's environment, recorded per run as ``pad_env_bytes``: environment size
  alone shifts stack alignment and with it timings, so randomizing it turns a
  hidden bias into measured noise (Mytkowicz et al. 2009).
* ``aslr: off`` — turn off address-space-layout randomization for the runs
  (``personality(ADDR_NO_RANDOMIZE)``) where the kernel allows; recorded per run.
* ``cold_cache: true`` — drop the page cache before each timed run where
  permitted (root); otherwise the run says it cannot, once, and goes on warm.
"""

from __future__ import annotations

from dataclasses import dataclass

from benchharness.experiment.yamlnodes import as_bool, is_null, node_error, scalar_text


@dataclass(frozen=True)
class Controls:
    pin: str | None = None
    nice: str | None = None
    clean_env: bool = False
    pad_env: bool = False
    aslr_off: bool = False
    cold_cache: bool = False

    @property
    def any(self) -> bool:
        return bool(self.pin or self.nice or self.clean_env or self.pad_env or self.aslr_off
                    or self.cold_cache)


def parse_controls(exp) -> Controls:
    s = exp.sections
    pin = nice = None
    if "pin" in s and not is_null(s["pin"]):
        pin = scalar_text(s["pin"], "'pin'")
    if "nice" in s and not is_null(s["nice"]):
        nice = scalar_text(s["nice"], "'nice'")
    aslr_off = False
    if "aslr" in s:
        text = scalar_text(s["aslr"], "'aslr'")
        if text in ("off", "false", "no", "Off", "OFF", "False"):
            aslr_off = True
        elif text not in ("on", "true", "yes", "On", "ON", "True", "default"):
            raise node_error(s["aslr"], f"'aslr' must be on or off, not {text!r}")
    return Controls(
        pin=pin, nice=nice,
        clean_env=as_bool(s["clean_env"], "'clean_env'") if "clean_env" in s else False,
        pad_env=as_bool(s["pad_env"], "'pad_env'") if "pad_env" in s else False,
        aslr_off=aslr_off,
        cold_cache=as_bool(s["cold_cache"], "'cold_cache'") if "cold_cache" in s else False,
    )


def resolve_cell(exp, controls: Controls, levels) -> dict:
    """Rendered, checked controls of one cell: ``{cpus, nice}`` (located errors)."""
    from benchharness.experiment import templating
    from benchharness.errors import ExecutionError
    from benchharness.execute.noise import check_cpus

    out = {"cpus": None, "nice": None}
    lookup = exp.lookup(levels)
    if controls.pin:
        text = templating.render(controls.pin, lookup)
        try:
            out["cpus"] = check_cpus(text)
        except ExecutionError as exc:
            raise node_error(exp.sections["pin"], f"'pin' {text!r}: {exc}; name CPUs this "
                                                  "machine has", exp.path) from None
    if controls.nice:
        text = templating.render(controls.nice, lookup)
        try:
            value = int(text)
        except ValueError:
            raise node_error(exp.sections["nice"], f"'nice' must be a whole number from -20 to "
                                                   f"19, not {text!r}", exp.path) from None
        if not -20 <= value <= 19:
            raise node_error(exp.sections["nice"], f"'nice' must be from -20 to 19, not "
                                                   f"{value}", exp.path)
        out["nice"] = value
    return out

"""Environments for runs: a minimal fixed one, and random-size padding.

Pure functions; the runner decides when to use them (``clean_env``,
``pad_env`` in the experiment file) and records the padding length per run.

Why pad: the size of the environment shifts the initial stack address of a
process and with it the alignment of everything on the stack, which alone can
change timings by several percent; randomising it per run turns that hidden
bias into visible noise that the analysis can average (Mytkowicz, Diwan,
Hauswirth & Sweeney 2009, "Producing wrong data without doing anything
obviously wrong!", ASPLOS).
"""

from __future__ import annotations

from typing import Mapping

#: The padding variable's name (its value is ``pad_len`` times ``x``).
PAD_VARIABLE = "BENCHHARNESS_PAD"
#: Upper bound of the padding length in bytes (inclusive); a page of stack.
PAD_MAX_BYTES = 4096
DEFAULT_PATH = "/usr/local/bin:/usr/bin:/bin"


def clean_environment(base: Mapping[str, str], keep=()) -> dict[str, str]:
    """A minimal, fixed environment derived from ``base``.

    Keeps ``PATH`` and ``HOME`` from ``base`` (defaults ``/usr/local/bin:/usr/bin:/bin``
    and ``/``), sets ``LANG=C.UTF-8``, ``LC_ALL=C.UTF-8`` and ``TZ=UTC``, and copies
    the variables named in ``keep`` that ``base`` has. Nothing else (no terminal,
    session or user-specific variables) reaches the command.
    """
    env = {
        "PATH": base.get("PATH") or DEFAULT_PATH,
        "HOME": base.get("HOME") or "/",
        "LANG": "C.UTF-8",
        "LC_ALL": "C.UTF-8",
        "TZ": "UTC",
    }
    for name in keep:
        if name in base:
            env[name] = base[name]
    return env


def pad_environment(env: Mapping[str, str], rng) -> tuple[dict[str, str], int]:
    """Return a copy of ``env`` with `PAD_VARIABLE` of random length 0..4096 bytes.

    ``rng`` is a ``numpy.random.Generator`` (``integers``) or a ``random.Random``
    (``randint``); the length is drawn uniformly, inclusive of both ends, so a
    seeded run is reproducible. Returns ``(env, pad_len)``; record ``pad_len``.
    """
    if hasattr(rng, "integers"):
        n = int(rng.integers(0, PAD_MAX_BYTES + 1))
    else:
        n = int(rng.randint(0, PAD_MAX_BYTES))
    out = dict(env)
    out[PAD_VARIABLE] = "x" * n
    return out, n


__all__ = ["clean_environment", "pad_environment", "PAD_VARIABLE", "PAD_MAX_BYTES"]

"""Warm-up versus steady state of one execution's per-iteration timings.

The method follows Barrett, Bolz-Tereick, Killick, Mount & Tratt (2017),
"Virtual machine warmup blows hot and cold" (OOPSLA): changepoints are found
with PELT (Killick et al. 2012, see `changepoint`), the last segment is the
candidate steady state, and the series falls in one of four classes, which we
name in our own plain words (`SHAPES`; docs/measurement.md):

* ``steady from the start``: no change in mean worth the name anywhere;
* ``steady after speeding up``: the steady state is reached and no earlier stretch
  was faster (the run sped up, then settled);
* ``steady after slowing down``: the steady state is reached but some earlier
  stretch was faster (the program got slower and stayed so);
* ``never steady``: the mean still changes within the final part of the
  series, so the run never settled.

Following Barrett et al., the changepoint penalty is 15 log n and a change
inside the last quarter of the series means never steady (both from
memory). Our own choices, documented in docs/measurement.md: a final segment
whose first and last thirds differ by more than the tolerance and three
standard errors is still drifting (never steady); the search runs on
log timings (per-run timings are right-skewed, common practice; a change then
means a relative change); isolated spikes (up to three points in a row far outside a
rolling median +- 6 rolling MADs, with an ordinary iteration before them:
outlying iterations from the first one on are warm-up) are replaced
by the rolling median for the search only; a single slow first iteration,
which PELT's two-iteration shortest segment cannot isolate, is split off
after the search; adjacent segments whose means differ by
less than ``rel_tol`` (2 %) or ``abs_tol_s`` are merged; the steady-state mean
is the plain mean of the final merged segment, spikes included (they are a
real cost of each iteration).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from benchharness.measure.steady.changepoint import DEFAULT_PENALTY_FACTOR, pelt

STEADY_FROM_START = "steady from the start"
FASTER_THEN_STEADY = "steady after speeding up"
SLOWER_THEN_STEADY = "steady after slowing down"
NEVER_STEADY = "never steady"
TOO_SHORT = "too short"
#: the classes of one run, in our own words (the JSON, runs.csv and every report use them)
SHAPES = (STEADY_FROM_START, FASTER_THEN_STEADY, SLOWER_THEN_STEADY, NEVER_STEADY)
#: the class of a cell whose runs fall in different classes
RUNS_DISAGREE = "runs disagree"
#: the names results folders written before this vocabulary carry, read as the new ones
EARLIER_NAMES = {"flat": STEADY_FROM_START, "warm-up": FASTER_THEN_STEADY,
                 "slow-down": SLOWER_THEN_STEADY, "no steady state": NEVER_STEADY,
                 "inconsistent": RUNS_DISAGREE}


def class_name(name):
    """The current name of a class read from a file (earlier names translated)."""
    return EARLIER_NAMES.get(name, name)


@dataclass(frozen=True)
class WarmupSettings:
    penalty_factor: float = DEFAULT_PENALTY_FACTOR  # penalty = factor * log(n)
    min_size: int = 2
    final_fraction: float = 0.25   # a change inside the last 25 % -> never steady
    min_final: int = 3             # ... or inside the last 3 iterations, whichever is more
    rel_tol: float = 0.02          # segment means within 2 % are the same level
    abs_tol_s: float = 1e-9
    despike: bool = True
    use_log: bool = True
    min_iterations: int = 8        # fewer iterations than this: no classification
    max_points: int = 4000         # longer series are searched in blocks of iterations


@dataclass(frozen=True)
class Segment:
    start: int
    end: int
    mean_s: float
    sd_s: float


@dataclass(frozen=True)
class WarmupResult:
    """What one execution's iterations say.

    ``shape`` is one of `SHAPES` (or `TOO_SHORT`); ``steady_from`` is the
    first iteration of the steady state (= warm-up length); ``steady_s`` the
    mean iteration time there (None without a steady state); ``changepoints``
    the raw PELT changepoints; ``segments`` after merging equivalent
    neighbours.
    """

    n: int
    shape: str
    steady_from: int | None
    steady_s: float | None
    steady_sd_s: float | None
    steady_n: int
    changepoints: tuple[int, ...]
    segments: tuple[Segment, ...]
    spikes: int
    reason: str = ""
    settings: WarmupSettings = field(default_factory=WarmupSettings)

    def to_json_dict(self) -> dict:
        return {
            "iterations": self.n, "shape": self.shape, "steady_from": self.steady_from,
            "steady_s": self.steady_s, "steady_sd_s": self.steady_sd_s,
            "steady_iterations": self.steady_n, "changepoints": list(self.changepoints),
            "segments": [{"start": s.start, "end": s.end, "mean_s": s.mean_s, "sd_s": s.sd_s}
                         for s in self.segments],
            "spikes": self.spikes, "reason": self.reason,
        }


def _rolling(values: np.ndarray, half: int, fn) -> np.ndarray:
    """``fn`` (a numpy reducer taking ``axis``) over a centred window, shrunk at the ends."""
    n = values.size
    out = np.empty(n)
    w = 2 * half + 1
    if n >= w:
        from numpy.lib.stride_tricks import sliding_window_view

        out[half:n - half] = fn(sliding_window_view(values, w), axis=1)
        edges = list(range(half)) + list(range(n - half, n))
    else:
        edges = range(n)
    for i in edges:
        lo, hi = max(0, i - half), min(n, i + half + 1)
        out[i] = fn(values[lo:hi])
    return out


def despike(z: np.ndarray, half_window: int = 10, k: float = 6.0,
            max_run: int = 3) -> tuple[np.ndarray, int]:
    """Replace isolated spikes (runs of at most ``max_run`` points) by the rolling median.

    A run of outlying points that starts at the first iteration is warm-up, not a
    spike: the first iteration is the prime warm-up suspect, and the iterations
    that follow it at the same far-off level (30, 31, 32 ms before a 10 ms steady
    state) are the rest of that warm-up. Hiding them would leave PELT a single
    outlying point, which a segment of at least ``min_size`` 2 cannot isolate,
    so the warm-up would be cut short and the hidden iterations counted in the
    steady state. Only runs with an ordinary iteration before them are spikes, and only those that
    stand apart from the iterations on both sides of them (`_departs`).
    """
    n = z.size
    if n < 2 * half_window:
        return z.copy(), 0
    med = _rolling(z, half_window, np.median)
    mad = _rolling(np.abs(z - med), half_window, np.median)
    scale = np.maximum(1.4826 * mad, 1e-12 + 1e-6 * np.abs(med))
    flagged = np.abs(z - med) > k * scale
    out = z.copy()
    count = 0
    i = 0
    while i < n:
        if flagged[i]:
            j = i
            while j < n and flagged[j]:
                j += 1
            if i > 0 and j - i <= max_run and _departs(z, i, j, k * scale[i:j].max()):
                out[i:j] = med[i:j]
                count += j - i
            i = j
        else:
            i += 1
    return out, count


def _departs(z: np.ndarray, i: int, j: int, cut: float) -> bool:
    """Whether the run ``z[i:j]`` stands apart from the iteration on each side of it.

    The rolling median lags behind a change of level, so the last iterations of a
    plateau (8 slow iterations, the median window already past them) or the
    first of a new level can be flagged; they continue the level of their
    neighbour and are part of a segment, not a spike.
    """
    level = float(np.median(z[i:j]))
    if abs(level - z[i - 1]) <= cut:
        return False
    return j >= z.size or abs(level - z[j]) > cut


def _same_level(a: float, b: float, s: WarmupSettings) -> bool:
    return abs(a - b) <= max(s.rel_tol * max(abs(a), abs(b)), s.abs_tol_s)


def _drift(part: np.ndarray, s: WarmupSettings) -> str:
    """Why the final segment still drifts (its first and last thirds differ), or ""."""
    k = part.size // 3
    if k < 3:
        return ""
    a, b = part[:k], part[-k:]
    diff = float(b.mean() - a.mean())
    se = math.sqrt(a.var(ddof=1) / k + b.var(ddof=1) / k)
    if abs(diff) > max(s.rel_tol * abs(float(part.mean())), 3 * se, s.abs_tol_s):
        way = "slower" if diff > 0 else "faster"
        return (f"the last {part.size} iterations keep getting {way} (their last third is "
                f"{abs(diff) / abs(float(a.mean())):.1%} {way} than their first third)")
    return ""


def _short_head(before: Segment, last: Segment, z: np.ndarray, min_size: int, make):
    """Move the start of the steady state back over iterations PELT had to leave out.

    PELT's shortest segment is ``min_size`` iterations, so a warm-up shorter than
    that (a single slow first iteration) comes out as a segment padded with
    steady iterations: [30, 10.2 | 10.2, 10.2, ...] ms. When the segment before
    the steady state is too short for PELT to have split it, its last iterations
    join the steady state if each lies nearer (on the searched scale) to the
    steady mean than to the rest of its own segment. Longer segments were the
    search's free choice and are left alone.
    """
    best = 0
    for d in range(1, min(min_size, before.end - before.start)):
        if before.end - before.start - d >= min_size:
            continue
        head = z[before.start:before.end - d]
        moved = z[before.end - d:before.end]
        steady = float(z[last.start:last.end].mean())
        if np.all(np.abs(moved - steady) < np.abs(moved - float(head.mean()))):
            best = d
    if not best:
        return [before, last]
    return [make(before.start, before.end - best), make(before.end - best, last.end)]


def classify(samples_s, settings: WarmupSettings | None = None) -> WarmupResult:
    """Classify one execution's iteration times (seconds, in iteration order)."""
    s = settings or WarmupSettings()
    y = np.asarray(list(samples_s), dtype=float)
    y = y[np.isfinite(y)]
    n = int(y.size)
    if n < s.min_iterations:
        return WarmupResult(n, TOO_SHORT, None, None, None, 0, (), (), 0,
                            reason=f"{n} iterations; at least {s.min_iterations} are needed "
                                   "to tell warm-up from steady state", settings=s)
    z, floor, spikes = _search_scale(y, s)
    changepoints, segments = _segments(y, z, floor, s)
    last = segments[-1]
    final = max(s.min_final, int(math.ceil(s.final_fraction * n)))
    if len(segments) > 1 and last.start > n - final:
        return WarmupResult(n, NEVER_STEADY, None, None, None, 0, changepoints, segments,
                            spikes, reason=f"the mean still changes at iteration {last.start} "
                            f"of {n} (within the last {final})", settings=s)
    drift = _drift(y[last.start:last.end], s)
    if drift:
        return WarmupResult(n, NEVER_STEADY, None, None, None, 0, changepoints,
                            segments, spikes, reason=drift, settings=s)
    return WarmupResult(n, _shape(segments, s), last.start, last.mean_s, last.sd_s,
                        last.end - last.start, changepoints, segments, spikes, settings=s)


def _search_scale(y: np.ndarray, s: WarmupSettings) -> tuple[np.ndarray, float, int]:
    """(series to search, its variance floor, spikes removed): the log of the times when
    they are all positive and ``use_log`` is set, else the times; despiked when asked."""
    positive = bool(np.all(y > 0))
    if s.use_log and positive:
        z = np.log(y)
        floor = (1e-4) ** 2            # 0.01 % relative noise: below timer meaning
    else:
        z = y
        floor = max((1e-4 * float(np.median(np.abs(y)))) ** 2, 1e-300)
    spikes = 0
    if s.despike:
        z, spikes = despike(z)
    return z, floor, spikes


def _segments(y: np.ndarray, z: np.ndarray, floor: float,
              s: WarmupSettings) -> tuple[tuple[int, ...], tuple[Segment, ...]]:
    """(changepoints, segments): PELT's changes in the mean (Killick et al. 2012) on ``z``,
    neighbours at the same level merged, the steady state's start moved back over a warm-up
    too short for PELT to split off."""
    n = int(y.size)
    # Long series: PELT's cost grows towards n^2 when there are few changes, so
    # beyond `max_points` the search runs on means of consecutive blocks of k
    # iterations (changepoints are then known to within k iterations).
    k = max(1, math.ceil(n / s.max_points))
    zs = z if k == 1 else np.array([z[i:i + k].mean() for i in range(0, n, k)])
    seg = pelt(zs, penalty=s.penalty_factor * math.log(zs.size), min_size=s.min_size,
               var_floor=floor)
    changepoints = tuple(c * k for c in seg.changepoints)
    bounds = [0, *changepoints, n]

    def make(a: int, b: int) -> Segment:
        part = y[a:b]
        return Segment(a, b, float(part.mean()), float(part.std(ddof=1)) if b - a > 1 else 0.0)

    merged: list[Segment] = []
    for a, b in zip(bounds[:-1], bounds[1:]):
        cur = make(a, b)
        if merged and _same_level(merged[-1].mean_s, cur.mean_s, s):
            merged[-1] = make(merged[-1].start, b)
        else:
            merged.append(cur)
    if len(merged) > 1:
        merged[-2:] = _short_head(merged[-2], merged[-1], z, s.min_size, make)
    return changepoints, tuple(merged)


def _shape(segments: tuple[Segment, ...], s: WarmupSettings) -> str:
    """Steady from the start, or faster/slower before the steady state (the last segment)."""
    last = segments[-1]
    if len(segments) == 1:
        return STEADY_FROM_START
    faster = [g for g in segments[:-1]
              if g.mean_s < last.mean_s and not _same_level(g.mean_s, last.mean_s, s)]
    return SLOWER_THEN_STEADY if faster else FASTER_THEN_STEADY

"""Response-surface designs for two to four numeric settings.

Each setting is a factor listed with two numbers, its low and its high value,
coded −1 and +1 (first listed = −1, as in a fraction). The design places runs
at coded points and turns each back into the setting's actual value:

* **central composite** (Box & Wilson 1951): the 2^k corners (±1 on every
  setting), 2k axial points (±α on one setting, 0 on the others) and runs at
  the centre. α is the *rotatable* distance (n_F)^(1/4) = 2^(k/4), which makes
  the variance of a prediction depend only on its distance from the centre
  (Box & Hunter 1957), or 1 for the *face-centred* design, whose axial points
  stay within the low and high values.
* **Box-Behnken** (Box & Behnken 1960), for 3 or 4 settings: every pair of
  settings at its four (±1, ±1) combinations with the others at 0 (the three
  pairs of 3 settings give 12 points, the six pairs of 4 give 24), and runs at
  the centre. Every setting takes only three values, never a corner.

The centre runs (repeated settings) give the pure error that the lack-of-fit
test of the second-order fit needs. Defaults: 5, 6 and 7 centre runs for a
rotatable central composite of 2, 3 and 4 settings (near uniform precision;
Box & Hunter 1957, as tabulated in Montgomery, *Design and Analysis of
Experiments*, ch. 11, from memory), 4 for a face-centred one, 3 for
Box-Behnken (Box & Behnken 1960).

A setting's values are spaced evenly between low and high, or evenly in
their logarithm (``log_scale``) for quantities such as buffer sizes.
A setting whose low and high are whole numbers only takes whole numbers: each
actual value is rounded (and `plan` says which ones moved). The analysis
codes the values as run, not as designed, so rounding costs nothing but a
little balance.

The explored region (where `choose` may propose a setting) is the set of
coded points within the design's reach on every setting and within its
radius: the sphere of radius α for a rotatable central composite, the cube
[−1, 1]^k for a face-centred one, and the cube cut by the sphere of radius √2
through the Box-Behnken points.
"""

from __future__ import annotations

import itertools
import math
from dataclasses import dataclass

from benchharness.design.fractional import DesignError

TYPE = "response-surface"
KEYS = ("type", "points", "axial", "centre_runs", "log_scale")
POINTS = ("central-composite", "box-behnken")
AXIAL = ("rotatable", "face")
MIN_SETTINGS, MAX_SETTINGS = 2, 4


def default_centre_runs(points: str, axial: str, k: int) -> int:
    """Centre runs when the file gives none (see the module docstring for the sources)."""
    if points == "box-behnken":
        return 3
    if axial == "face":
        return 4
    return {2: 5, 3: 6, 4: 7}[k]


@dataclass(frozen=True)
class Setting:
    """One numeric setting: low and high (coded −1, +1), spacing and rounding."""

    name: str
    low: float
    high: float
    log: bool = False
    whole: bool = False

    @property
    def centre(self) -> float:
        return math.sqrt(self.low * self.high) if self.log else (self.low + self.high) / 2

    @property
    def half(self) -> float:
        """Half the coded range in the setting's units (or in its natural log)."""
        if self.log:
            return (math.log(self.high) - math.log(self.low)) / 2
        return (self.high - self.low) / 2

    def exact(self, x: float) -> float:
        """The actual value of coded ``x`` before rounding."""
        if self.log:
            return math.exp(math.log(self.centre) + x * self.half)
        return self.centre + x * self.half

    def actual(self, x: float) -> float:
        """The actual value run at coded ``x`` (rounded to a whole number if the setting is)."""
        v = self.exact(x)
        return float(round(v)) if self.whole else v

    def coded(self, value: float) -> float:
        """The coded value of an actual value (the inverse of `exact`)."""
        if self.log:
            return (math.log(value) - math.log(self.centre)) / self.half
        return (value - self.centre) / self.half

    def label(self, x: float) -> str:
        """The level label (text put into the command) of coded ``x``."""
        return number_label(self.actual(x), self.whole)

    def to_json_dict(self) -> dict:
        return {"name": self.name, "low": self.low, "high": self.high,
                "scale": "log" if self.log else "linear", "whole_numbers": self.whole}


def number_label(v: float, whole: bool = False) -> str:
    """A value as a level label: whole numbers plainly, others to 4 significant digits
    (no exponent, so a command receives a number every program reads)."""
    if whole or v == int(v) and abs(v) < 1e15:
        return str(int(round(v)))
    digits = max(0, 3 - int(math.floor(math.log10(abs(v)))))
    text = f"{round(v, digits):.{digits}f}"
    return text.rstrip("0").rstrip(".") if "." in text else text


@dataclass(frozen=True)
class SurfaceDesign:
    """A response-surface design: its settings, its points (coded) and its centre runs."""

    points: str                    # "central-composite" | "box-behnken"
    axial: str | None              # "rotatable" | "face" (central composite only)
    alpha: float                   # axial distance (central composite); 1 for Box-Behnken
    settings: tuple[Setting, ...]
    centre_runs: int

    @property
    def k(self) -> int:
        return len(self.settings)

    @property
    def names(self) -> tuple[str, ...]:
        return tuple(s.name for s in self.settings)

    def parts(self) -> dict[str, list[tuple[float, ...]]]:
        """The coded points by kind: corners / edges, axial points, centre (once)."""
        k = self.k
        if self.points == "box-behnken":
            edges = []
            for i, j in itertools.combinations(range(k), 2):
                for a, b in itertools.product((-1.0, 1.0), repeat=2):
                    x = [0.0] * k
                    x[i], x[j] = a, b
                    edges.append(tuple(x))
            return {"edge": edges, "centre": [(0.0,) * k]}
        corners = [tuple(float(v) for v in c) for c in itertools.product((-1, 1), repeat=k)]
        axial = []
        for i in range(k):
            for s in (-1.0, 1.0):
                x = [0.0] * k
                x[i] = s * self.alpha
                axial.append(tuple(x))
        return {"corner": corners, "axial": axial, "centre": [(0.0,) * k]}

    def coded_points(self) -> list[tuple[float, ...]]:
        """Every point of one replicate, the centre repeated ``centre_runs`` times."""
        p = self.parts()
        out = [x for kind, xs in p.items() if kind != "centre" for x in xs]
        return out + p["centre"] * self.centre_runs

    def cells(self) -> list[dict[str, str]]:
        """Plan cells (factor → label), one per point of a replicate (the centre repeated)."""
        return [{s.name: s.label(x) for s, x in zip(self.settings, pt)}
                for pt in self.coded_points()]

    def coded_levels(self) -> list[float]:
        """The distinct coded values a setting takes, ascending."""
        vals = {x for pt in self.coded_points() for x in pt}
        return sorted(vals)

    def region(self) -> dict:
        """The explored region in coded units: ``|x_i| <= reach`` and ``|x| <= radius``."""
        if self.points == "box-behnken":
            return {"reach": 1.0, "radius": math.sqrt(2.0)}
        if self.axial == "face":
            return {"reach": 1.0, "radius": math.sqrt(self.k)}
        return {"reach": self.alpha, "radius": self.alpha}

    def coded_of_labels(self, labels: dict[str, str]) -> tuple[float, ...]:
        """Coded values of a cell given by its labels (as run: rounding included)."""
        return tuple(s.coded(float(labels[s.name])) for s in self.settings)

    def level_table(self) -> list[dict]:
        """Per setting: every coded level with its exact and actual value."""
        out = []
        for s in self.settings:
            rows = []
            for x in self.coded_levels():
                rows.append({"coded": x, "exact": s.exact(x), "actual": s.actual(x),
                             "label": s.label(x)})
            out.append({"setting": s.name, "levels": rows})
        return out

    def to_json_dict(self) -> dict:
        p = self.parts()
        return {
            "type": TYPE, "points": self.points, "axial": self.axial, "alpha": self.alpha,
            "settings": [s.to_json_dict() for s in self.settings],
            "runs_per_replicate": len(self.coded_points()),
            "point_counts": {kind: len(xs) for kind, xs in p.items() if kind != "centre"}
            | {"centre": self.centre_runs},
            "coded_points": [list(x) for x in self.coded_points()],
            "levels": self.level_table(),
            "region": self.region(),
        }


def build(names, lows_highs, points="central-composite", axial="rotatable",
          centre_runs=None, log_scale=(), whole=None) -> SurfaceDesign:
    """A `SurfaceDesign` from plain values (`DesignError` when they cannot make one).

    ``lows_highs`` gives (low, high) per setting; ``whole`` (per setting: round to
    whole numbers) defaults to no rounding (the file rounds a setting whose low and
    high are written as whole numbers).
    """
    k = len(names)
    if not MIN_SETTINGS <= k <= MAX_SETTINGS:
        fix = ("add a second numeric setting, or study the one setting with its levels "
               "listed and no design: (a trend over it)" if k < MIN_SETTINGS else
               "fix the others at one level in the command, or screen them first with a "
               "fractional design")
        raise DesignError(f"a response surface takes 2 to 4 numeric settings, not {k}; {fix}")
    if points not in POINTS:
        raise DesignError(f"points {points!r} is not known; use " + " or ".join(POINTS))
    if points == "box-behnken":
        if k < 3:
            raise DesignError("a Box-Behnken design needs 3 or 4 settings; with 2 use "
                              "points: central-composite")
        axial, alpha = None, 1.0
    else:
        if axial not in AXIAL:
            raise DesignError(f"axial {axial!r} is not known; use rotatable or face")
        alpha = 2 ** (k / 4) if axial == "rotatable" else 1.0
    if centre_runs is None:
        centre_runs = default_centre_runs(points, axial, k)
    if centre_runs < 2:
        raise DesignError("centre_runs must be at least 2: repeated centre runs give the "
                          "pure error the lack-of-fit test needs")
    unknown = [n for n in log_scale if n not in names]
    if unknown:
        raise DesignError(f"log_scale names {unknown[0]!r}, which is not a factor; the "
                          "settings are " + ", ".join(names))
    settings = []
    for i, (name, (lo, hi)) in enumerate(zip(names, lows_highs)):
        is_whole = False if whole is None else bool(whole[i])
        s = Setting(name, float(lo), float(hi), log=name in log_scale, whole=is_whole)
        if s.high <= s.low:
            raise DesignError(f"factor {name!r}: list the low value first and the high "
                              f"value second (got {number_label(lo)}, {number_label(hi)})")
        if s.log and s.low <= 0:
            raise DesignError(f"factor {name!r}: a log scale needs positive values, "
                              f"not a low of {number_label(lo)}")
        settings.append(s)
    design = SurfaceDesign(points, axial, float(alpha), tuple(settings), int(centre_runs))
    _check_levels(design)
    return design


def _check_levels(design: SurfaceDesign) -> None:
    """Refuse values that cannot run: a negative or zero axial value where low and high
    are positive, or two coded levels that round to the same whole number."""
    for s in design.settings:
        labels = {}
        for x in design.coded_levels():
            v = s.actual(x)
            if s.low > 0 and v <= 0:
                raise DesignError(
                    f"factor {s.name!r}: the axial point at coded {x:+.3g} is "
                    f"{number_label(s.exact(x))}, not a positive value; narrow the range, "
                    "use axial: face, or put the setting on log_scale")
            lab = s.label(x)
            if lab in labels:
                raise DesignError(
                    f"factor {s.name!r}: coded {labels[lab]:+.3g} and {x:+.3g} both round "
                    f"to {lab}; widen the range between {number_label(s.low)} and "
                    f"{number_label(s.high)}, or write them as 1.0-style numbers to keep "
                    "fractions")
            labels[lab] = x


def expand_factors(factors, factors_node, design_node, path):
    """The experiment's factors, each surface setting given every value the design runs.

    Called once by the experiment file's loader: a response-surface setting is
    written ``[low, high]`` but runs at up to five values, and every later stage
    (the journal's level check, the analysis, the reports) knows a factor's
    levels from the experiment. Other designs leave ``factors`` as they are.
    """
    type_node = type_node_of(design_node)
    if type_node is None or getattr(type_node, "value", None) != TYPE:
        return factors
    from benchharness.experiment.yamlnodes import expect_mapping

    keys = expect_mapping(design_node, "'design'", KEYS)
    design = _from_nodes(_factor_nodes(factors_node), keys, type_node, path)
    values = setting_values(design)
    out = []
    for f in factors:
        level_type = type(f.levels[0])
        out.append(type(f)(f.name, tuple(level_type(lab) for lab in values[f.name])))
    return tuple(out)


def from_section(exp, keys: dict, type_node, path) -> SurfaceDesign:
    """Read a ``design: {type: response-surface, ...}`` section (keys already split).

    Every factor of the experiment is a numeric setting written ``[low, high]``
    in the file (read from the file's text: the loaded factors already hold
    every value the design runs). Errors point at the offending key or factor.
    """
    import yaml

    root = yaml.compose(exp.source_text)
    fnode = None
    if isinstance(root, yaml.MappingNode):
        fnode = next((v for k, v in root.value if k.value == "factors"), None)
    return _from_nodes(_factor_nodes(fnode), keys, type_node, path)


def type_node_of(node):
    """The value node of ``type`` in a design mapping (None when absent or not a mapping)."""
    import yaml

    if not isinstance(node, yaml.MappingNode):
        return None
    for k, v in node.value:
        if getattr(k, "value", None) == "type":
            return v
    return None


def _factor_nodes(fnode) -> list:
    """``[(name, levels node)]`` of the file's ``factors:`` mapping."""
    import yaml

    if not isinstance(fnode, yaml.MappingNode):
        return []
    return [(k.value, v) for k, v in fnode.value]


def _from_nodes(factor_nodes, keys: dict, type_node, path) -> SurfaceDesign:
    """The design from the file's factor nodes and design keys; errors located."""
    from benchharness.experiment.yamlnodes import node_error

    names = [n for n, _v in factor_nodes]
    points, axial, centre, logs = _options(keys, names, path)
    lows_highs, whole = _lows_highs(factor_nodes, path)
    try:
        return build(names, lows_highs, points=points, axial=axial, centre_runs=centre,
                     log_scale=logs, whole=whole)
    except DesignError as e:
        node = type_node
        if e.bare.startswith("factor "):
            node = dict(factor_nodes).get(e.bare.split("'")[1], type_node)
        elif e.bare.startswith("a Box-Behnken"):
            node = keys.get("points", type_node)
        raise node_error(node, f"design: {e.bare}", path) from None


def _options(keys: dict, names, path):
    """(points, axial, centre runs or None, log-scale settings) from the design keys."""
    from benchharness.experiment.yamlnodes import (
        as_int, node_error, scalar_text, sequence_items,
    )

    def opt(key, default, allowed):
        if key not in keys:
            return default
        v = scalar_text(keys[key], f"'design: {key}'")
        if v not in allowed:
            raise node_error(keys[key], f"design: {key} {v!r} is not known; use "
                                        + " or ".join(allowed), path)
        return v

    points = opt("points", "central-composite", POINTS)
    axial = opt("axial", "rotatable", AXIAL)
    if "axial" in keys and points == "box-behnken":
        raise node_error(keys["axial"], "design: 'axial' belongs to a central composite; a "
                                        "Box-Behnken design has no axial points", path)
    centre = None
    if "centre_runs" in keys:
        centre = as_int(keys["centre_runs"], "'design: centre_runs'", minimum=2)
    logs: list[str] = []
    for n in (sequence_items(keys["log_scale"], "'design: log_scale'")
              if "log_scale" in keys else []):
        name = scalar_text(n, "a factor name")
        if name not in names:
            raise node_error(n, f"design: log_scale names {name!r}, which is not a "
                                "factor; the settings are " + ", ".join(names), path)
        logs.append(name)
    return points, axial, centre, logs


def _lows_highs(factor_nodes, path):
    """([(low, high)], [whole numbers?]) of every factor, each written ``[low, high]``."""
    import yaml

    from benchharness.experiment.yamlnodes import node_error

    lows_highs, whole = [], []
    for name, vnode in factor_nodes:
        items = vnode.value if isinstance(vnode, yaml.SequenceNode) else None
        texts = [i.value for i in items if isinstance(i, yaml.ScalarNode)] if items else []
        if items is None or len(items) != 2 or len(texts) != 2:
            raise node_error(vnode, f"factor {name!r} of a response surface lists its low and "
                                    f"high value, e.g. {name}: [2, 16]", path)
        try:
            lows_highs.append(tuple(float(t) for t in texts))
        except ValueError:
            raise node_error(vnode, f"factor {name!r} of a response surface must be numeric "
                                    f"(its low and high value, e.g. [2, 16]), not "
                                    f"{', '.join(texts)}", path) from None
        if not all(math.isfinite(v) for v in lows_highs[-1]):
            raise node_error(vnode, f"factor {name!r}: low and high must be finite numbers",
                             path)
        whole.append(all(_is_whole_text(t) for t in texts))
    return lows_highs, whole


def _is_whole_text(text: str) -> bool:
    """A level written as a whole number (``16``, not ``16.0``)."""
    t = text.strip().lstrip("+-")
    return t.isdigit()


def coded_text(x: float) -> str:
    """A coded value as `plan` shows it: ``0``, ``-1``, ``+1.414``."""
    return "0" if abs(x) < 1e-12 else f"{x:+.4g}"


def setting_values(design: SurfaceDesign) -> dict:
    """Per setting, its level labels ascending by coded value (the plan's levels)."""
    return {s.name: [s.label(x) for x in design.coded_levels()] for s in design.settings}


def describe(d: dict) -> list[str]:
    """Plain lines for `benchharness plan` from `SurfaceDesign.to_json_dict`."""
    k = len(d["settings"])
    c = d["point_counts"]
    if d["points"] == "box-behnken":
        head = (f"design      response surface, Box-Behnken, {k} settings: "
                f"{c['edge']} edge points + {c['centre']} centre runs = "
                f"{d['runs_per_replicate']} runs per replicate")
    else:
        how = ("rotatable" if d["axial"] == "rotatable" else "face-centred")
        head = (f"design      response surface, central composite ({how}, axial points at "
                f"±{d['alpha']:.4g}), {k} settings: {c['corner']} corner + {c['axial']} "
                f"axial points + {c['centre']} centre runs = {d['runs_per_replicate']} runs "
                "per replicate")
    distinct = len({tuple(p) for p in d["coded_points"]})
    head += f" ({distinct} distinct settings; the centre is run {c['centre']} times)"
    lines = [head, "  coded -> actual values (low = -1, high = +1):"]
    moved = []
    for s, lv in zip(d["settings"], d["levels"]):
        scale = "log scale" if s["scale"] == "log" else "linear"
        cells = ", ".join(f"{coded_text(r['coded'])} -> {r['label']}" for r in lv["levels"])
        lines.append(f"    {s['name']} ({scale}): {cells}")
        for r in lv["levels"]:
            if s["whole_numbers"] and abs(r["exact"] - r["actual"]) > 1e-9:
                moved.append(f"{s['name']} {number_label(r['exact'])} -> {r['label']}")
    if moved:
        lines.append("  rounded to whole numbers (the analysis uses the values as run): "
                     + ", ".join(moved))
    r = d["region"]
    if d["points"] == "box-behnken":
        reg = "within ±1 on every setting and within √2 of the centre"
    elif d["axial"] == "face":
        reg = "within ±1 on every setting (the box between low and high)"
    else:
        reg = f"within {r['radius']:.4g} of the centre (coded)"
    lines.append(f"  explored region: {reg}; choose proposes settings only inside it")
    return lines

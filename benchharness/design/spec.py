"""The ``design:`` section of the experiment file: which cells, which blocks.

Forms (keys may be combined where it makes sense)::

    design: {type: fractional, generators: ["D = AB", "E = AC"]}
    design: {type: fractional, resolution: 4}      # smallest fraction of resolution IV
    design: {cells: 16}                            # 16-cell fraction, minimum aberration
    design: {blocks: 4}                            # confound chosen interactions with 4 blocks
    design: {block_on: ["ABC", "BCD"]}             # ... or the interactions given
    design: {resolution: 4, blocks: 2}             # a blocked fraction

``type`` is ``full`` (default) or ``fractional``; ``generators``,
``resolution`` and ``cells`` imply ``fractional``. Fractions and confounded
blocks need every factor to have exactly two levels (first listed = -1).
Validation errors point at ``FILE:LINE:COL`` of the offending value.

`design_of(exp)` returns a `DesignChoice`; `benchharness.design.build_plan`
turns it into plan cells, blocks and the design facts shown by ``plan``.
"""

from __future__ import annotations

from dataclasses import dataclass

from benchharness.design.blocking import Blocking, blocking_from_words, choose_blocking
from benchharness.design.fractional import (
    DesignError, FractionalDesign, design_for_cells, design_for_resolution,
    design_from_generators, full_design, roman,
)
from benchharness.design.surface import TYPE as surface_type
from benchharness.design.surface import SurfaceDesign
from benchharness.design.surface import describe as surface_describe
from benchharness.experiment.yamlnodes import (
    as_int, expect_mapping, node_error, scalar_text, sequence_items,
)

KEYS = ("type", "generators", "resolution", "cells", "blocks", "block_on")
TYPES = ("full", "fractional", surface_type)
#: Keys `DesignChoice.info` adds to ``Plan.info`` (shown by `describe_info`).
DESIGN_INFO_KEYS = ("design", "resolution", "defining_relation", "aliases",
                    "confounded_with_blocks")


@dataclass(frozen=True)
class DesignChoice:
    """What the design section asks for. ``design`` None = general full factorial."""

    design: FractionalDesign | None = None
    blocking: Blocking | None = None
    surface: SurfaceDesign | None = None     # a response-surface design (design/surface.py)

    @property
    def changes_plan(self) -> bool:
        """A two-level design (fraction or confounded blocks) replaces the full factorial."""
        return self.design is not None and (self.design.is_fraction or self.blocking is not None)

    def cells(self) -> list[dict[str, str]] | None:
        if self.surface is not None:
            return self.surface.cells()
        if not self.changes_plan:
            return None
        return self.design.cells()

    def blocks_of_cell(self) -> list[int] | None:
        if self.blocking is None:
            return None
        return self.blocking.block_of_cells()

    def info(self) -> dict:
        """Design facts for ``plan --json`` and ``design.json`` (JSON-ready)."""
        if self.surface is not None:
            return {"design": self.surface.to_json_dict()}
        if not self.changes_plan:
            return {}
        d = self.design.to_json_dict()
        info: dict = {"design": d}
        if self.design.is_fraction:
            info["resolution"] = d["resolution"]
            info["defining_relation"] = d["defining_relation"]
            info["aliases"] = d["aliases"]
        if self.blocking is not None:
            b = self.blocking.to_json_dict()
            d["blocking"] = b
            info["confounded_with_blocks"] = b["confounded_with_blocks"]
        return info

    def describe(self) -> list[str]:
        if self.surface is not None:
            return surface_describe(self.surface.to_json_dict())
        if not self.changes_plan:
            return []
        lines = self.design.describe()
        if self.blocking is not None:
            lines += self.blocking.describe()
        return lines


def _factors(exp):
    return [(f.name, f.labels) for f in exp.factors]


_CACHE: dict = {}


def design_of(exp) -> DesignChoice:
    """Read and validate ``exp.sections['design']`` (memoised: searches can take a second)."""
    node = getattr(exp, "sections", {}).get("design")
    if node is None:
        return DesignChoice()
    from benchharness.experiment.yamlnodes import to_plain

    try:
        key = (repr(to_plain(node)), tuple((f.name, tuple(f.labels)) for f in exp.factors))
    except Exception:  # noqa: BLE001 - malformed nodes are reported by the parse below
        key = None
    if key is not None and key in _CACHE:
        return _CACHE[key]
    choice = _design_of(exp, node)
    if key is not None:
        if len(_CACHE) > 32:
            _CACHE.clear()
        _CACHE[key] = choice
    return choice


def _design_of(exp, node) -> DesignChoice:
    """Validate the ``design:`` section into a `DesignChoice`: which kind of design, the
    two-level design itself, then its blocking; errors point at the key they concern."""
    path = getattr(exp, "path", None)
    from benchharness.design import surface

    type_node = surface.type_node_of(node)
    if type_node is not None and getattr(type_node, "value", None) == surface_type:
        keys = expect_mapping(node, "'design'", surface.KEYS)
        return DesignChoice(surface=surface.from_section(exp, keys, type_node, path))
    keys = expect_mapping(node, "'design'", KEYS)
    kind, fraction_keys = _design_kind(node, keys)
    if kind == "full" and "blocks" not in keys and "block_on" not in keys:
        return DesignChoice()
    design = _two_level_design(exp, node, keys, kind, fraction_keys, path)
    return DesignChoice(design, _blocking_of(design, node, keys, path))


def _design_kind(node, keys) -> tuple[str, list[str]]:
    """``(kind, fraction keys)``: "full" or "fractional" and which of generators,
    resolution and cells make the fraction (at most one); refuses contradictions."""
    kind = "full"
    if "type" in keys:
        kind = scalar_text(keys["type"], "'design: type'")
        if kind not in TYPES:
            raise node_error(keys["type"], f"design type {kind!r} is not known; use 'full', "
                                           f"'fractional' or '{surface_type}'")
    fraction_keys = [k for k in ("generators", "resolution", "cells") if k in keys]
    if kind == "full" and fraction_keys and "type" in keys:
        raise node_error(keys[fraction_keys[0]],
                         f"'{fraction_keys[0]}' makes a fractional design but 'type' is 'full'; "
                         f"write 'type: fractional' or drop '{fraction_keys[0]}'")
    if fraction_keys:
        kind = "fractional"
    if len(fraction_keys) > 1:
        raise node_error(keys[fraction_keys[1]],
                         f"give only one of 'generators', 'resolution' and 'cells' "
                         f"(found {', '.join(fraction_keys)})")
    if kind == "fractional" and not fraction_keys:
        raise node_error(node, "a fractional design needs 'generators' (e.g. [\"D = ABC\"]), "
                               "'resolution' (3, 4 or 5) or 'cells' (e.g. 16)")
    if "blocks" in keys and "block_on" in keys:
        raise node_error(keys["block_on"], "give 'blocks' (chosen automatically) or 'block_on' "
                                           "(the interactions to confound), not both")
    return kind, fraction_keys


class _Located:
    """A `DesignError` raised inside becomes an error at the line of ``key`` (else of
    the section)."""

    def __init__(self, keys, node, key, path):
        self.keys, self.node, self.key, self.path = keys, node, key, path

    def __enter__(self):
        return self

    def __exit__(self, et, ev, tb):
        if isinstance(ev, DesignError):
            raise node_error(self.keys.get(self.key, self.node), f"design: {ev.bare}",
                             self.path) from None
        return False


def _two_level_design(exp, node, keys, kind, fraction_keys, path):
    """The full two-level factorial or the fraction the section asks for (by generators,
    resolution or number of cells)."""
    factors = _factors(exp)
    first_key = fraction_keys[0] if fraction_keys else ("blocks" if "blocks" in keys else "block_on")
    with _Located(keys, node, first_key, path):
        if kind == "full":
            return full_design(factors)
        if "generators" in keys:
            gens = [scalar_text(g, "a generator") for g in
                    sequence_items(keys["generators"], "'design: generators'")]
            if not gens:
                raise DesignError("generators is empty; give one or more like 'D = ABC'")
            return _generators_located(factors, keys["generators"], gens, path)
        if "resolution" in keys:
            r = as_int(keys["resolution"], "'design: resolution'", minimum=3)
            return design_for_resolution(factors, r)
        n = as_int(keys["cells"], "'design: cells'", minimum=2)
        return design_for_cells(factors, n)


def _blocking_of(design, node, keys, path):
    """The blocking the section asks for (a number of blocks, or the interactions to
    confound with blocks); None without one."""
    if "blocks" in keys:
        with _Located(keys, node, "blocks", path):
            return choose_blocking(design, as_int(keys["blocks"], "'design: blocks'",
                                                  minimum=2))
    if "block_on" in keys:
        words = [scalar_text(w, "a block word") for w in
                 sequence_items(keys["block_on"], "'design: block_on'")]
        with _Located(keys, node, "block_on", path):
            return blocking_from_words(design, words)
    return None


def _generators_located(factors, seq_node, gens, path):
    """Build the fraction; an error in one generator points at that generator's line."""
    from benchharness.design.fractional import two_level_labels

    two_level_labels(factors)   # level-count errors belong to the factors, not a generator
    for i, gnode in enumerate(seq_node.value):
        try:
            design_from_generators(factors, gens[:i + 1])
        except DesignError as e:
            msg = e.bare[len("generator "):] if e.bare.startswith("generator ") else e.bare
            raise node_error(gnode, f"design: generator {msg}", path) from None
    return design_from_generators(factors, gens)


def describe_info(info: dict) -> list[str]:
    """Plain lines for `benchharness plan` from the JSON design facts (`DesignChoice.info`)."""
    d = info.get("design")
    if not d:
        return []
    if d.get("type") == surface_type:
        return surface_describe(d)
    lines = []
    letters = ", ".join(f"{a}={n}" for a, n in d["factors"].items())
    if d["type"] == "fractional":
        lines.append(f"design      fractional factorial {d['fraction']}: {d['cells']} cells, "
                     f"resolution {roman(d['resolution'])}")
    else:
        lines.append(f"design      full two-level factorial {d['fraction']}: {d['cells']} cells")
    lines.append(f"  letters   {letters} (first listed level = -1, second = +1)")
    if d["type"] == "fractional":
        lines += _fraction_lines(d)
    if d.get("blocking"):
        lines += _blocking_lines(d)
    return lines


def _fraction_lines(d: dict) -> list[str]:
    """A fraction's generators, defining relation, word-length pattern, alias chains and
    clear effects."""
    lines = []
    how = "chosen by minimum aberration" if "generator_search" in d else "as given"
    lines.append(f"  generators ({how}): " + ", ".join(d["generators"]))
    gs = d.get("generator_search")
    if gs and not gs.get("exhaustive", True):
        lines.append("  note: the generator search hit its work limit; this is the best "
                     "design found, not proven minimum aberration")
    lines.append("  defining relation: I = " + " = ".join(d["defining_relation"]))
    wlp = d["word_length_pattern"]
    lines.append("  word-length pattern (words of length 3, 4, ...): "
                 + " ".join(str(c) for c in wlp[2:]))
    lines.append("  aliases (up to three-factor interactions):")
    chains = [(eff, al) for eff, al in d["aliases"].items() if al]
    if len(chains) > 30:
        mains = [(eff, al) for eff, al in chains if len(eff) == 1]
        for eff, al in mains:
            lines.append(f"    {eff} = " + " = ".join(al))
        lines.append(f"    ... and {len(chains) - len(mains)} two-factor interaction chains "
                     f"(see plan --json)")
    else:
        for eff, al in chains:
            lines.append(f"    {eff} = " + " = ".join(al))
    clear = d["clear_effects"]
    lines.append("  clear (aliased with no main effect or two-factor interaction): "
                 + (", ".join(clear) if clear else "none"))
    return lines


def _blocking_lines(d: dict) -> list[str]:
    """The blocks: how many, their generators, and the effects confounded with them."""
    b = d["blocking"]
    lines = []
    per = d["cells"] // b["blocks"]
    how = "chosen to keep confounded effects of highest order" if "block_search" in b \
        else "as given"
    lines.append(f"  blocks    {b['blocks']} per replicate, {per} cells each; generators "
                 f"({how}): " + ", ".join(b["block_generators"]))
    chains = b.get("confounded_with_blocks_aliases", {})
    parts = []
    for w in b["confounded_with_blocks"]:
        al = chains.get(w) or []
        parts.append(w + (" (= " + " = ".join(al) + ")" if al else ""))
    lines.append("  confounded with blocks: " + ", ".join(parts))
    low = [w for w in b["confounded_with_blocks"] if len(w) <= 2]
    if low:
        lines.append("  warning: two-factor interactions confounded with blocks: "
                     + ", ".join(low))
    return lines

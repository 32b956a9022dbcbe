"""Two-level fractional factorial designs 2^(k-p): generators, defining relation, aliases.

A 2^(k-p) fraction runs every combination of k-p *basic* factors and sets each
of the p *generated* factors to a product of basic factors (its generator,
``D = AB``). The defining relation is the set of all products of the generator
words (``I = ABD = ...``); its shortest word is the resolution, and the counts
of words of each length are the word-length pattern. Each effect is aliased
with its products by the words of the defining relation. Method: Box & Hunter
(1961), "The 2^(k-p) fractional factorial designs"; minimum aberration as in
Fries & Hunter (1980); "clear" effects as in Wu & Chen (1992); Montgomery,
*Design and Analysis of Experiments*, ch. 8.

Coding: the first listed level of a factor is -1, the second +1. Only
two-level factors can be fractioned. Letters are positions (see
`benchharness.design.words`), so a factor may be named ``I``.

Automatic generators: for ``resolution: R`` we take the smallest fraction that
reaches resolution R; for ``cells: N`` the fraction with N cells; in both cases
the generator set of minimum aberration found by `benchharness.design.search`
(computed by comparing word-length patterns, not looked up in a table). The
basic factors are the first k-p listed, the generated ones the last p.
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field
from typing import Sequence

from benchharness.design import words as W
from benchharness.design.search import DEFAULT_NODE_LIMIT, best_word_set
from benchharness.errors import ExperimentError


class DesignError(ExperimentError):
    """A design request cannot be met (bad generator, impossible resolution...)."""


@dataclass(frozen=True)
class Generator:
    """``factor = sign * product(word)``: a generated factor's column."""

    factor: int        # position of the generated factor
    word: int          # mask of the basic factors it is the product of
    sign: int = 1      # -1 for ``D = -ABC`` (the other half)

    @property
    def defining_word(self) -> int:
        return self.word | (1 << self.factor)

    def letters(self) -> str:
        return f"{W.LETTERS[self.factor]} = {'-' if self.sign < 0 else ''}{W.letters(self.word)}"


@dataclass(frozen=True)
class FractionalDesign:
    """A 2^(k-p) two-level design (p = 0 is the full factorial).

    ``factor_names`` in listed order; ``level_labels[i]`` = (label coded -1,
    label coded +1). ``generators`` in the order given. ``search`` describes an
    automatic choice (``None`` when the generators were given).
    """

    factor_names: tuple[str, ...]
    level_labels: tuple[tuple[str, str], ...]
    generators: tuple[Generator, ...] = ()
    search: dict | None = None
    defining: tuple[tuple[int, int], ...] = field(init=False, repr=False, compare=False)

    def __post_init__(self):
        words = W.group([(g.defining_word, g.sign) for g in self.generators])
        words.sort(key=lambda ws: W.sort_key(ws[0]))
        object.__setattr__(self, "defining", tuple(words))

    # -- sizes -----------------------------------------------------------------
    @property
    def k(self) -> int:
        return len(self.factor_names)

    @property
    def p(self) -> int:
        return len(self.generators)

    @property
    def n_cells(self) -> int:
        return 2 ** (self.k - self.p)

    @property
    def generated(self) -> tuple[int, ...]:
        return tuple(g.factor for g in self.generators)

    @property
    def basic(self) -> tuple[int, ...]:
        gen = set(self.generated)
        return tuple(i for i in range(self.k) if i not in gen)

    @property
    def is_fraction(self) -> bool:
        return self.p > 0

    # -- defining relation -----------------------------------------------------
    @property
    def resolution(self) -> int | None:
        """Length of the shortest defining word; None for a full factorial."""
        if not self.defining:
            return None
        return min(W.order(m) for m, _ in self.defining)

    @property
    def word_length_pattern(self) -> tuple[int, ...]:
        """Counts of defining words of length 1, 2, ..., k."""
        return W.word_length_pattern(self.defining, self.k)

    def defining_words(self) -> list[str]:
        """Words of the defining relation (``["ABCD"]``, or ``["-ABCD"]`` for the other half)."""
        return [W.signed_letters(m, s) for m, s in self.defining]

    def defining_relation_text(self) -> str:
        if not self.defining:
            return "I (full factorial: no defining words)"
        return "I = " + " = ".join(self.defining_words())

    # -- aliases ---------------------------------------------------------------
    def alias_set(self, mask: int) -> list[tuple[int, int]]:
        """Words aliased with ``mask`` (excluding itself), shortest first, with signs."""
        out = [(mask ^ m, s) for m, s in self.defining]
        out.sort(key=lambda ws: W.sort_key(ws[0]))
        return out

    def alias_class(self, mask: int) -> list[tuple[int, int]]:
        """``mask`` and its aliases; each element (word, sign relative to ``mask``)."""
        return [(mask, 1)] + self.alias_set(mask)

    def effect_order(self, mask: int) -> int:
        """Order of the lowest-order effect in the alias class of ``mask`` (0: the mean)."""
        return min(W.order(m) for m, _ in self.alias_class(mask))

    def low_order_effects(self) -> list[int]:
        """All main effects and two-factor interactions, in standard order."""
        k = self.k
        out = [1 << i for i in range(k)]
        out += [(1 << i) | (1 << j) for i in range(k) for j in range(i + 1, k)]
        return out

    def aliases(self, max_order: int = 3) -> dict[str, list[str]]:
        """Each main effect and 2FI -> its aliases of order <= ``max_order`` (letters)."""
        out: dict[str, list[str]] = {}
        for mask in self.low_order_effects():
            out[W.letters(mask)] = [W.signed_letters(m, s) for m, s in self.alias_set(mask)
                                    if 0 < W.order(m) <= max_order]
        return out

    def clear_effects(self) -> list[str]:
        """Main effects and 2FIs aliased with no other main effect or 2FI (Wu & Chen 1992)."""
        out = []
        for mask in self.low_order_effects():
            if all(W.order(m) > 2 for m, _ in self.alias_set(mask)):
                out.append(W.letters(mask))
        return out

    def confounded_effects(self) -> list[str]:
        clear = set(self.clear_effects())
        return [W.letters(m) for m in self.low_order_effects() if W.letters(m) not in clear]

    def estimable(self) -> list[tuple[int, list[tuple[int, int]]]]:
        """One representative per alias class (lowest order first) with its aliases.

        The 2^(k-p) - 1 classes other than the mean's; a representative is the
        class member over the basic factors of lowest order.
        """
        seen: set[int] = set()
        classes = []
        basic = self.basic
        reps = []
        for r in range(1, 2 ** len(basic)):
            mask = 0
            for bit, pos in enumerate(basic):
                if r >> bit & 1:
                    mask |= 1 << pos
            cls = self.alias_class(mask)
            best = min(cls, key=lambda ws: W.sort_key(ws[0]))
            reps.append(best[0])
        for rep in sorted(reps, key=W.sort_key):
            if rep in seen:
                continue
            seen.add(rep)
            classes.append((rep, self.alias_set(rep)))
        return classes

    # -- cells -----------------------------------------------------------------
    def coded_cells(self) -> list[tuple[int, ...]]:
        """The 2^(k-p) cells as ±1 codes per factor, basic factors in standard order.

        Standard (Yates) order: the first basic factor alternates fastest.
        """
        basic = self.basic
        cells = []
        for r in range(2 ** len(basic)):
            code = [0] * self.k
            for bit, pos in enumerate(basic):
                code[pos] = 1 if (r >> bit) & 1 else -1
            for g in self.generators:
                v = g.sign
                for pos in W.positions(g.word):
                    v *= code[pos]
                code[g.factor] = v
            cells.append(tuple(code))
        return cells

    def cells(self) -> list[dict[str, str]]:
        """The cells as level labels per factor name."""
        out = []
        for code in self.coded_cells():
            out.append({name: self.level_labels[i][0 if c < 0 else 1]
                        for i, (name, c) in enumerate(zip(self.factor_names, code))})
        return out

    def letter_map(self) -> dict[str, str]:
        return {W.LETTERS[i]: name for i, name in enumerate(self.factor_names)}

    def to_json_dict(self) -> dict:
        d = {
            "type": "fractional" if self.is_fraction else "full",
            "factors": {W.LETTERS[i]: name for i, name in enumerate(self.factor_names)},
            "coding": {name: {"-1": lo, "+1": hi}
                       for name, (lo, hi) in zip(self.factor_names, self.level_labels)},
            "fraction": f"2^({self.k}-{self.p})" if self.is_fraction else f"2^{self.k}",
            "cells": self.n_cells,
            "generators": [g.letters() for g in self.generators],
            "resolution": self.resolution,
            "defining_relation": self.defining_words(),
            "word_length_pattern": list(self.word_length_pattern),
            "aliases": self.aliases(),
            "clear_effects": self.clear_effects(),
            "confounded_effects": self.confounded_effects(),
        }
        if self.search is not None:
            d["generator_search"] = dict(self.search)
        return d

    def describe(self) -> list[str]:
        """Plain-text lines for `benchharness plan`."""
        lines = []
        letters = ", ".join(f"{W.LETTERS[i]}={n}" for i, n in enumerate(self.factor_names))
        if not self.is_fraction:
            lines.append(f"design: full two-level factorial 2^{self.k} ({self.n_cells} cells)")
            lines.append(f"  letters: {letters}")
            return lines
        lines.append(f"design: fractional factorial 2^({self.k}-{self.p}), {self.n_cells} of "
                     f"{2 ** self.k} cells, resolution {roman(self.resolution)}")
        lines.append(f"  letters: {letters}")
        how = "chosen by minimum aberration" if self.search else "as given"
        lines.append(f"  generators ({how}): " + ", ".join(g.letters() for g in self.generators))
        if self.search and not self.search.get("exhaustive", True):
            lines.append(f"  note: generator search stopped after {self.search['nodes']} candidate "
                         f"sets; the design is the best found, not proven minimum aberration")
        lines.append(f"  defining relation: {self.defining_relation_text()}")
        wlp = self.word_length_pattern
        lines.append("  word-length pattern (lengths 3..k): "
                     + " ".join(str(c) for c in wlp[2:]) if self.k >= 3 else
                     "  word-length pattern: " + " ".join(map(str, wlp)))
        lines.append("  aliases (up to three-factor interactions):")
        for eff, al in self.aliases().items():
            if al:
                lines.append(f"    {eff} = " + " = ".join(al))
        clear = self.clear_effects()
        lines.append("  clear effects: " + (", ".join(clear) if clear else "none"))
        return lines


def roman(r: int | None) -> str:
    if r is None:
        return "full"
    table = {1: "I", 2: "II", 3: "III", 4: "IV", 5: "V", 6: "VI", 7: "VII", 8: "VIII",
             9: "IX", 10: "X"}
    return table.get(r, str(r))


# -- parsing generators ---------------------------------------------------------

_LETTER_RUN = re.compile(r"^[A-HJ-Z]+$")


def parse_word(text: str, names: Sequence[str], star_mode: bool, what: str = "word",
               gen_text: str | None = None) -> tuple[int, int]:
    """Parse a word (``ABD``, ``-ABC``, ``threads*batch``) into (mask, sign).

    ``star_mode``: the text uses ``*``/``:`` between factor names.
    """
    gen_text = text if gen_text is None else gen_text
    s, sign = _strip_sign(text)
    if not s:
        raise DesignError(f"{gen_text!r}: the {what} is empty; write e.g. 'D = ABC' "
                          f"or 'cache = threads*batch'")
    if star_mode:
        return _star_mask(s, names, gen_text), sign
    mask = _letters_mask(s, len(names))
    if mask is not None:
        return mask, sign
    if s in names:
        return 1 << names.index(s), sign
    raise _word_error(s, len(names), gen_text)


def _strip_sign(text: str) -> tuple[str, int]:
    """The word without its leading signs, and the sign they make (+1 or -1)."""
    s = text.strip()
    sign = 1
    while s[:1] in "+-":
        if s[0] == "-":
            sign = -sign
        s = s[1:].strip()
    return s, sign


def _star_mask(s: str, names: Sequence[str], gen_text: str) -> int:
    """The mask of factor names (or single factor letters) joined by ``*`` or ``:``."""
    k = len(names)
    mask = 0
    for t in (t.strip() for t in re.split(r"[*:]", s)):
        if not t:
            raise DesignError(f"{gen_text!r}: empty factor name around '*'")
        if t in names:
            pos = names.index(t)
        elif len(t) == 1 and t in W.LETTERS and W.LETTERS.index(t) < k:
            pos = W.LETTERS.index(t)
        else:
            raise DesignError(f"{gen_text!r}: {t!r} is not a factor; factors are "
                              + ", ".join(names))
        if mask >> pos & 1:
            raise DesignError(f"{gen_text!r}: {t!r} appears twice")
        mask |= 1 << pos
    return mask


def _letters_mask(s: str, k: int) -> int | None:
    """The mask of a run of distinct factor letters; None when ``s`` is not one."""
    if not _LETTER_RUN.match(s):
        return None
    mask = 0
    for ch in s:
        pos = W.LETTERS.index(ch)
        if pos >= k or mask >> pos & 1:
            return None
        mask |= 1 << pos
    return mask


def _word_error(s: str, k: int, gen_text: str) -> DesignError:
    """Why ``s`` is neither factor letters nor a factor name, in words."""
    if _LETTER_RUN.match(s):
        bad = [ch for ch in s if W.LETTERS.index(ch) >= k]
        if bad:
            return DesignError(
                f"{gen_text!r}: letter {bad[0]} names no factor; with {k} factors the "
                f"letters are {W.LETTERS[:k]} (A = first listed factor; I is skipped)")
        return DesignError(f"{gen_text!r}: a letter appears twice in {s!r}")
    if "I" in s and re.fullmatch(r"[A-Z]+", s):
        return DesignError(f"{gen_text!r}: I is the identity, not a factor letter; "
                           f"letters skip it ({W.LETTERS[:min(k, 10)]}...)")
    return DesignError(f"{gen_text!r}: {s!r} is neither factor letters nor a factor "
                       f"name; use letters (D = ABC) or names joined by '*' (cache = threads*batch)")


def parse_generator(text: str, names: Sequence[str]) -> tuple[int, int, int]:
    """Parse ``"D = AB"`` / ``"cache = threads*batch"`` -> (factor position, word mask, sign).

    Without ``*`` each side is read as letters when it is a run of factor
    letters (letters are positions and take precedence), else as one factor
    name. With ``*`` (or ``:``) the tokens are factor names (a single letter
    that is not a name is read as a position).
    """
    if not isinstance(text, str) or text.count("=") != 1:
        raise DesignError(f"generator {text!r}: write it as 'NEW = PRODUCT', e.g. 'D = ABC' or "
                          f"'cache = threads*batch'")
    lhs, rhs = text.split("=")
    star = "*" in text or ":" in text
    lmask, lsign = parse_word(lhs, names, star, "left side", text)
    rmask, rsign = parse_word(rhs, names, star, "right side", text)
    if W.order(lmask) != 1:
        raise DesignError(f"generator {text!r}: the left side must be one factor "
                          f"(the generated one), got {W.letters(lmask)}")
    if lmask & rmask:
        raise DesignError(f"generator {text!r}: the generated factor also appears on the right")
    if W.order(rmask) < 2:
        raise DesignError(f"generator {text!r}: the right side must multiply at least two "
                          f"factors (one factor would make the two columns identical)")
    return W.positions(lmask)[0], rmask, lsign * rsign


# -- building designs ------------------------------------------------------------

def two_level_labels(factors) -> tuple[tuple[str, ...], tuple[tuple[str, str], ...]]:
    """factors: sequence of (name, [level labels]). Checks every factor has two levels."""
    names = tuple(n for n, _ in factors)
    labels = []
    for name, levels in factors:
        levels = tuple(levels)
        if len(levels) != 2:
            raise DesignError(
                f"factor {name!r} has {len(levels)} levels; fractional factorials and confounded "
                f"blocks need exactly two levels per factor (first listed = -1, second = +1)")
        labels.append((str(levels[0]), str(levels[1])))
    if len(names) > W.MAX_FACTORS:
        raise DesignError(f"{len(names)} factors; two-level designs here support at most "
                          f"{W.MAX_FACTORS} (letters A..Z without I)")
    return names, tuple(labels)


def full_design(factors) -> FractionalDesign:
    names, labels = two_level_labels(factors)
    return FractionalDesign(names, labels, ())


def design_from_generators(factors, generator_texts: Sequence[str]) -> FractionalDesign:
    """A fraction from user generators. ``factors`` = [(name, [lo, hi]), ...]."""
    names, labels = two_level_labels(factors)
    parsed = [parse_generator(t, names) for t in generator_texts]
    generated = {}
    for (pos, _m, _s), t in zip(parsed, generator_texts):
        if pos in generated:
            raise DesignError(f"generator {t!r}: {names[pos]!r} is already generated by "
                              f"{generated[pos]!r}; each generated factor has one generator")
        generated[pos] = t
    gens = []
    for (pos, mask, sign), t in zip(parsed, generator_texts):
        used = [q for q in W.positions(mask) if q in generated]
        if used:
            q = used[0]
            raise DesignError(
                f"generator {t!r} uses {names[q]!r} ({W.LETTERS[q]}), which is itself generated "
                f"by {generated[q]!r}; write generators over basic (not generated) factors only")
        gens.append(Generator(pos, mask, sign))
    seen = {}
    for g, t in zip(gens, generator_texts):
        if g.word in seen:
            raise DesignError(
                f"generator {t!r} multiplies the same factors as {seen[g.word]!r}: the two "
                f"generated factors would share one column (resolution II) and could never be "
                f"told apart; give each generated factor a different product")
        seen[g.word] = t
    if len(gens) >= len(names):
        raise DesignError("as many generators as factors: at least one factor must be basic")
    return FractionalDesign(names, labels, tuple(gens))


def _auto(names, labels, p: int, min_resolution: int, node_limit: int) -> FractionalDesign | None:
    k = len(names)
    nb = k - p
    cands = [m for m in range(1, 2 ** nb) if W.order(m) >= max(2, min_resolution - 1)]
    cands.sort(key=lambda m: (-W.order(m), W.positions(m)))
    res = best_word_set(cands, p, k, lambda j, c: c | (1 << (nb + j)), W.order,
                        max(min_resolution, 3), node_limit, symmetric=True)
    if (res is None or not res.chosen) and min_resolution == 4:
        # Products of basic factors of odd order (>= 3) give defining words of
        # even length only, so any p distinct ones reach resolution IV (the
        # "even" designs; common practice). A smaller space to search.
        odd = [m for m in cands if W.order(m) % 2 == 1]
        if len(odd) >= p:
            res = best_word_set(odd, p, k, lambda j, c: c | (1 << (nb + j)), W.order, 4,
                                node_limit, symmetric=True)
    if res is None or not res.chosen:
        return None
    gens = tuple(Generator(nb + j, c, 1) for j, c in enumerate(res.chosen))
    search = {"method": "minimum aberration (branch and bound over generator sets)",
              "exhaustive": res.exhaustive, "nodes": res.nodes}
    return FractionalDesign(names, labels, gens, search)


def rao_bound_allows(k: int, cells: int, resolution: int) -> bool:
    """Rao's (1947) bound: can ``cells`` runs hold k two-level factors at this resolution?

    Resolution 2t+1 needs sum_{i<=t} C(k, i) cells; resolution 2t+2 needs
    2 * sum_{i<=t} C(k-1, i). A necessary condition only (prunes hopeless searches).
    """
    from math import comb
    t = (resolution - 1) // 2
    if resolution % 2:
        need = sum(comb(k, i) for i in range(t + 1))
    else:
        need = 2 * sum(comb(k - 1, i) for i in range(t + 1))
    return cells >= need


def design_for_cells(factors, cells: int, node_limit: int = DEFAULT_NODE_LIMIT) -> FractionalDesign:
    """Minimum-aberration fraction with ``cells`` cells (a power of two)."""
    names, labels = two_level_labels(factors)
    k = len(names)
    if cells < 2 or cells & (cells - 1):
        raise DesignError(f"cells: {cells} is not a power of two; a two-level fraction has "
                          f"2, 4, 8, 16, ... cells")
    if cells > 2 ** k:
        raise DesignError(f"cells: {cells} is more than the {2 ** k} cells of the full factorial "
                          f"of {k} two-level factors")
    if cells == 2 ** k:
        return FractionalDesign(names, labels, ())
    if cells < k + 1:
        raise DesignError(f"cells: {cells} cannot hold {k} two-level factors; a fraction needs at "
                          f"least k+1 = {k + 1} cells (so {1 << k.bit_length()} or more)")
    p = k - (cells.bit_length() - 1)
    # Highest reachable resolution first: the constraint shrinks the candidate
    # list, so proving a resolution impossible is cheap and the feasible
    # search is small.
    for r in range(k - p + 1, 2, -1):
        if not rao_bound_allows(k, cells, r):
            continue
        d = _auto(names, labels, p, r, node_limit)
        if d is not None:
            return d
    raise DesignError(f"no 2^({k}-{p}) design of resolution III exists")  # pragma: no cover


def design_for_resolution(factors, resolution: int,
                          node_limit: int = DEFAULT_NODE_LIMIT) -> FractionalDesign:
    """The smallest minimum-aberration fraction with resolution >= ``resolution``.

    Returns the full factorial when no fraction reaches it.
    """
    names, labels = two_level_labels(factors)
    k = len(names)
    if resolution < 3:
        raise DesignError(f"resolution: {resolution}; ask for 3 (main effects clear of each "
                          f"other), 4 (main effects clear of 2FIs) or 5 (2FIs clear of each other)")
    p = k - 1
    while p >= 1 and 2 ** (k - p) < k + 1:
        p -= 1
    while p >= 1:
        if not rao_bound_allows(k, 2 ** (k - p), resolution):
            p -= 1
            continue
        d = _auto(names, labels, p, resolution, node_limit)
        if d is not None:
            return d
        p -= 1
    return FractionalDesign(names, labels, ())

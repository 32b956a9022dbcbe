"""Blocking a two-level design into 2^q blocks by confounding interactions.

When a full replicate of a 2^k (or of a 2^(k-p) fraction) cannot run under
uniform conditions (one machine session, one boot, one cache state), its cells
are split into 2^q blocks of equal size. Each of q independent *block words*
splits the cells by its sign; the block effect is then confounded with those
q words **and with all their generalized interactions** (products), 2^q - 1
effects in all: blocking on ABC and BCD also confounds ABC·BCD = AD. In a
fraction an effect is confounded together with its whole alias chain. Method:
Yates (1937); Montgomery, *Design and Analysis of Experiments*, ch. 7; the
choice that maximises the lowest order of the confounded effects (then has the
fewest of that order) follows the minimum-aberration idea of Sun, Wu & Chen
(1997) for blocked designs, computed by `benchharness.design.search`.

Block numbering: block 0 (shown as 1 in plans) is the principal block, the one
holding the cell with every factor at its first level.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

from benchharness.design import words as W
from benchharness.design.fractional import DesignError, FractionalDesign, parse_word
from benchharness.design.search import DEFAULT_NODE_LIMIT, best_word_set


@dataclass(frozen=True)
class Blocking:
    """A design split into 2^q blocks by the block words ``words`` (bit masks)."""

    design: FractionalDesign
    words: tuple[int, ...]
    search: dict | None = None

    @property
    def q(self) -> int:
        return len(self.words)

    @property
    def n_blocks(self) -> int:
        return 2 ** self.q

    def confounded(self) -> list[int]:
        """All 2^q - 1 confounded effects: the block words and their products.

        Each is given by the lowest-order member of its alias chain, shortest first.
        """
        out = []
        for mask, _ in W.group([(w, 1) for w in self.words]):
            cls = self.design.alias_class(mask)
            out.append(min((m for m, _ in cls), key=W.sort_key))
        return sorted(out, key=W.sort_key)

    def lowest_order(self) -> int:
        return min(self.design.effect_order(m) for m in self.confounded())

    def block_of_cells(self) -> list[int]:
        """Block index (0-based) of each cell of ``design.coded_cells()``.

        Bit j of the index is 1 when block word j takes the sign opposite to its
        sign in the all-first-levels cell.
        """
        out = []
        for code in self.design.coded_cells():
            b = 0
            for j, w in enumerate(self.words):
                v = 1
                for pos in W.positions(w):
                    v *= code[pos]
                ref = (-1) ** W.order(w)
                if v != ref:
                    b |= 1 << j
            out.append(b)
        return out

    def confounded_words(self) -> list[str]:
        return [W.letters(m) for m in self.confounded()]

    def confounded_chains(self) -> dict[str, list[str]]:
        """For a fraction: each confounded effect -> its aliases up to three factors."""
        return {W.letters(m): [W.signed_letters(a, s) for a, s in self.design.alias_set(m)
                               if 0 < W.order(a) <= 3]
                for m in self.confounded()}

    def to_json_dict(self) -> dict:
        d = {
            "blocks": self.n_blocks,
            "block_generators": [W.letters(w) for w in self.words],
            "confounded_with_blocks": self.confounded_words(),
            "confounded_with_blocks_terms": [W.term(m, self.design.factor_names)
                                             for m in self.confounded()],
            "lowest_confounded_order": self.lowest_order(),
        }
        if self.design.is_fraction:
            d["confounded_with_blocks_aliases"] = self.confounded_chains()
        if self.search is not None:
            d["block_search"] = dict(self.search)
        return d

    def describe(self) -> list[str]:
        how = "chosen to keep confounded effects of highest order" if self.search else "as given"
        lines = [f"blocks: {self.n_blocks} blocks of {self.design.n_cells // self.n_blocks} cells "
                 f"per replicate, block generators ({how}): "
                 + ", ".join(W.letters(w) for w in self.words)]
        conf = self.confounded()
        parts = []
        for m in conf:
            al = [W.signed_letters(a, s) for a, s in self.design.alias_set(m) if 0 < W.order(a) <= 3]
            parts.append(W.letters(m) + (" (= " + " = ".join(al) + ")" if al else ""))
        lines.append("  confounded with blocks (not estimable apart from the block effect): "
                     + ", ".join(parts))
        low = [W.letters(m) for m in conf if self.design.effect_order(m) <= 2]
        if low:
            lines.append("  warning: two-factor interactions confounded with blocks: "
                         + ", ".join(low))
        return lines


def _check_blocks(design: FractionalDesign, n_blocks: int) -> int:
    if n_blocks < 2 or n_blocks & (n_blocks - 1):
        raise DesignError(f"blocks: {n_blocks} is not a power of two; confounded blocking "
                          f"splits each replicate into 2, 4, 8, ... blocks")
    q = n_blocks.bit_length() - 1
    if n_blocks > design.n_cells // 2:
        raise DesignError(f"blocks: {n_blocks} blocks of a {design.n_cells}-cell design would "
                          f"leave fewer than 2 cells per block; use at most "
                          f"{max(design.n_cells // 2, 1)} blocks")
    return q


def choose_blocking(design: FractionalDesign, n_blocks: int,
                    node_limit: int = DEFAULT_NODE_LIMIT) -> Blocking:
    """Block words maximising the lowest order of all confounded effects (then fewest of it)."""
    q = _check_blocks(design, n_blocks)
    basic = design.basic
    cands = []
    for r in range(1, 2 ** len(basic)):
        mask = 0
        for bit, pos in enumerate(basic):
            if r >> bit & 1:
                mask |= 1 << pos
        cands.append(mask)
    order_cache: dict[int, int] = {}

    def order_of(mask: int) -> int:
        o = order_cache.get(mask)
        if o is None:
            o = design.effect_order(mask) if mask else 0
            order_cache[mask] = o
        return o

    cands = [m for m in cands if order_of(m) >= 2]
    cands.sort(key=lambda m: (-order_of(m), W.positions(m)))
    res = None
    # Highest reachable lowest order first (small candidate lists), as for fractions.
    for floor in range(design.k, 1, -1):
        sub = [m for m in cands if order_of(m) >= floor]
        if len(sub) < q:
            continue
        res = best_word_set(sub, q, design.k, lambda j, c: c, order_of, floor, node_limit,
                            symmetric=not design.is_fraction)
        if res is not None and res.chosen:
            break
        res = None
    if res is None:
        raise DesignError(f"cannot split the {design.n_cells} cells into {n_blocks} blocks "
                          f"without confounding a main effect with blocks; use fewer blocks")
    search = {"method": "largest lowest order of confounded effects (branch and bound)",
              "exhaustive": res.exhaustive, "nodes": res.nodes}
    return Blocking(design, tuple(res.chosen), search)


def blocking_from_words(design: FractionalDesign, texts: Sequence[str]) -> Blocking:
    """Blocks from user words (``["ABC", "BCD"]`` or ``["threads*batch*cache"]``)."""
    if not texts:
        raise DesignError("block_on is empty; give one or more interactions like 'ABC'")
    _check_blocks(design, 2 ** len(texts))
    masks = []
    for t in texts:
        if not isinstance(t, str):
            raise DesignError(f"block_on: {t!r} is not a word; write interactions like 'ABC' or "
                              f"'threads*batch*cache'")
        star = "*" in t or ":" in t
        mask, _sign = parse_word(t, design.factor_names, star, "block word", t)
        if design.effect_order(mask) < 2:
            what = "a main effect" if design.effect_order(mask) == 1 else "the mean"
            raise DesignError(f"block_on: {t!r} is {what} in this design; block on "
                              f"interactions of two or more factors (e.g. 'ABC')")
        masks.append(mask)
    b = Blocking(design, tuple(masks))
    for m, _ in W.group([(w, 1) for w in masks]):
        if m == 0 or any(m == d for d, _ in design.defining):
            raise DesignError(f"block_on: {', '.join(texts)} are not independent (a product of "
                              f"them is the identity); drop one or choose another")
        if design.effect_order(m) < 2:
            raise DesignError(f"block_on: {', '.join(texts)} also confounds the main effect "
                              f"{W.letters(min((x for x, _ in design.alias_class(m)), key=W.sort_key))}"
                              f" with blocks (a product of the words); choose other words")
    return b



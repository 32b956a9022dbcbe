"""Confounded blocking of two-level designs.

References: Montgomery, *Design and Analysis of Experiments*, ch. 7 and its
table of suggested blocking arrangements (from memory); the generalized
interaction rule ABC x BCD = AD (Yates 1937; from memory).
"""

from __future__ import annotations

import itertools

import pytest

from benchharness.design import words as W
from benchharness.design.blocking import blocking_from_words, choose_blocking
from benchharness.design.fractional import DesignError, design_from_generators, full_design


def letters(k):
    return [(c, ["lo", "hi"]) for c in W.LETTERS[:k]]


def pattern(design, masks):
    return W.word_length_pattern([(m, 1) for m in
                                  [min((x for x, _ in design.alias_class(g)), key=W.sort_key)
                                   for g, _ in W.group([(w, 1) for w in masks])]], design.k)


def brute_force_best(design, q):
    cands = [m for m in range(1, 2 ** design.k) if W.order(m) >= 2]
    best = None
    for combo in itertools.combinations(cands, q):
        g = W.group([(w, 1) for w in combo])
        if any(m == 0 or W.order(m) < 2 for m, _ in g):
            continue
        pat = W.word_length_pattern(g, design.k)
        if best is None or pat < best:
            best = pat
    return best


def check_blocks(bl):
    d = bl.design
    blocks = bl.block_of_cells()
    cells = d.coded_cells()
    # Equal block sizes.
    counts = [blocks.count(b) for b in range(bl.n_blocks)]
    assert counts == [d.n_cells // bl.n_blocks] * bl.n_blocks
    # Every confounded effect is constant within each block; every other is balanced.
    conf = set(bl.confounded())
    for b in range(bl.n_blocks):
        members = [c for c, bb in zip(cells, blocks) if bb == b]
        for mask in range(1, 2 ** d.k):
            vals = {int(_prod(c, mask)) for c in members}
            in_chain = any(x in conf for x, _ in d.alias_class(mask))
            if in_chain:
                assert len(vals) == 1
    # The principal block holds the all-first-levels cell (Montgomery ch. 7).
    low = tuple(-1 for _ in range(d.k))
    if low in cells:
        assert blocks[cells.index(low)] == 0


def _prod(code, mask):
    v = 1
    for pos in W.positions(mask):
        v *= code[pos]
    return v


def test_2_4_in_two_blocks_confounds_ABCD():
    # Montgomery ch. 7 (from memory): the highest-order interaction ABCD.
    bl = choose_blocking(full_design(letters(4)), 2)
    assert bl.confounded_words() == ["ABCD"]
    check_blocks(bl)


def test_generalized_interaction_is_reported():
    # ABC x BCD = AD (the issue's own example; Yates' rule, from memory).
    bl = blocking_from_words(full_design(letters(4)), ["ABC", "BCD"])
    assert sorted(bl.confounded_words()) == ["ABC", "AD", "BCD"]
    assert bl.to_json_dict()["confounded_with_blocks"] == ["AD", "ABC", "BCD"]
    check_blocks(bl)


@pytest.mark.parametrize("k, blocks, suggested", [
    # Montgomery's suggested arrangements (from memory): same lowest order and pattern.
    (4, 4, ["ABC", "ACD"]),
    (5, 4, ["ADE", "BCE"]),
    (5, 8, ["ABE", "BCE", "CDE"]),
    (6, 8, ["ABEF", "ABCD", "ACE"]),
    (6, 4, ["ABCF", "CDEF"]),
])
def test_automatic_blocks_match_suggested_arrangements(k, blocks, suggested):
    d = full_design(letters(k))
    bl = choose_blocking(d, blocks)
    ref = blocking_from_words(d, suggested)
    assert pattern(d, bl.words) <= pattern(d, ref.words)
    assert bl.lowest_order() == ref.lowest_order()
    check_blocks(bl)


@pytest.mark.parametrize("k, blocks", [(4, 4), (5, 4), (5, 8), (6, 8)])
def test_automatic_blocks_are_best_by_brute_force(k, blocks):
    d = full_design(letters(k))
    bl = choose_blocking(d, blocks)
    assert pattern(d, bl.words) == brute_force_best(d, blocks.bit_length() - 1)


def test_blocking_a_fraction_uses_alias_chains():
    # 2^(6-2)_IV, E = ABC, F = BCD in 2 blocks: a chain of three-factor interactions
    # (ABD = ACF = BEF = CDE) is the best choice; no 2FI chain is confounded.
    d = design_from_generators(letters(6), ["E = ABC", "F = BCD"])
    bl = choose_blocking(d, 2)
    assert bl.lowest_order() == 3
    j = bl.to_json_dict()
    chain = j["confounded_with_blocks_aliases"][j["confounded_with_blocks"][0]]
    assert all(len(w.lstrip("-")) >= 3 for w in chain)
    check_blocks(bl)


def test_bad_block_requests():
    d = full_design(letters(4))
    with pytest.raises(DesignError, match="power of two"):
        choose_blocking(d, 3)
    with pytest.raises(DesignError, match="fewer than 2 cells"):
        choose_blocking(d, 16)
    with pytest.raises(DesignError, match="main effect"):
        blocking_from_words(d, ["A"])
    with pytest.raises(DesignError, match="not independent"):
        blocking_from_words(d, ["ABC", "ABD", "CD"])
    with pytest.raises(DesignError, match="main effect"):
        blocking_from_words(d, ["ABC", "AB"])   # product C is a main effect
    with pytest.raises(DesignError, match="3 levels"):
        full_design([("a", ["1", "2", "3"]), ("b", ["x", "y"])])

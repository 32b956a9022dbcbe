"""Fractional factorials: generators, defining relation, resolution, aliases, automatic choice.

Reference designs are the standard ones of Box, Hunter & Hunter, *Statistics for
Experimenters* (2nd ed., ch. 6) and Montgomery, *Design and Analysis of
Experiments*, Table 8.14 (from memory).
"""

from __future__ import annotations

import itertools

import pytest

from benchharness.design import words as W
from benchharness.design.fractional import (
    DesignError, design_for_cells, design_for_resolution, design_from_generators, full_design,
    parse_generator,
)


def two_level(names):
    return [(n, ["lo", "hi"]) for n in names]


def letters(k):
    return two_level(W.LETTERS[:k])


def test_2_7_4_resolution_III():
    # BHH ch. 6 / Montgomery Table 8.14 (from memory): 2^(7-4)_III with D=AB, E=AC, F=BC, G=ABC.
    d = design_from_generators(letters(7), ["D = AB", "E = AC", "F = BC", "G = ABC"])
    assert d.n_cells == 8
    assert d.resolution == 3
    # Saturated design: 7 words of length 3, 7 of length 4, 1 of length 7 (15 = 2^4 - 1).
    assert d.word_length_pattern == (0, 0, 7, 7, 0, 0, 1)
    assert set(d.defining_words()) >= {"ABD", "ACE", "BCF", "ABCG"}
    # Every main effect is aliased with three two-factor interactions (from memory: A = BD = CE = FG).
    assert set(d.aliases()["A"]) >= {"BD", "CE", "FG"}
    assert d.clear_effects() == []


def test_2_5_1_resolution_V():
    # BHH / Montgomery (from memory): 2^(5-1)_V with E = ABCD, I = ABCDE.
    d = design_from_generators(letters(5), ["E = ABCD"])
    assert d.defining_words() == ["ABCDE"]
    assert d.resolution == 5
    assert d.aliases()["AB"] == ["CDE"]
    assert d.aliases()["A"] == []          # A = BCDE, a four-factor word, beyond three factors
    assert len(d.clear_effects()) == 5 + 10  # all main effects and 2FIs are clear


def test_2_6_2_resolution_IV():
    # Montgomery Table 8.14 (from memory): 2^(6-2)_IV with E = ABC, F = BCD;
    # I = ABCE = BCDF = ADEF.
    d = design_from_generators(letters(6), ["E = ABC", "F = BCD"])
    assert sorted(d.defining_words()) == ["ABCE", "ADEF", "BCDF"]
    assert d.resolution == 4
    assert d.word_length_pattern[2:] == (0, 3, 0, 0)
    assert set(d.aliases()["AB"]) == {"CE"}
    # Main effects alias only 3FIs and longer (from memory: A = BCE = DEF = ABCDF).
    assert set(d.aliases()["A"]) == {"BCE", "DEF"}
    assert "A" in d.clear_effects() and "AB" not in d.clear_effects()


def test_2_4_1_alias_pairs():
    # BHH ch. 6 (from memory): half fraction 2^(4-1) with D = ABC, I = ABCD:
    # A = BCD, B = ACD, C = ABD, D = ABC, AB = CD, AC = BD, AD = BC.
    d = design_from_generators(letters(4), ["D = ABC"])
    al = d.aliases()
    assert al["A"] == ["BCD"] and al["B"] == ["ACD"] and al["C"] == ["ABD"] and al["D"] == ["ABC"]
    assert al["AB"] == ["CD"] and al["AC"] == ["BD"] and al["AD"] == ["BC"]
    # The cells: D is the product of A, B and C in every run.
    for code in d.coded_cells():
        assert code[3] == code[0] * code[1] * code[2]
    assert len(set(d.coded_cells())) == 8


def test_negative_generator_gives_the_other_half():
    # Common practice: D = -ABC is the complementary half of D = ABC.
    a = design_from_generators(letters(4), ["D = ABC"])
    b = design_from_generators(letters(4), ["D = -ABC"])
    assert b.defining_words() == ["-ABCD"]
    assert set(a.coded_cells()).isdisjoint(b.coded_cells())
    assert len(set(a.coded_cells()) | set(b.coded_cells())) == 16
    assert b.aliases()["A"] == ["-BCD"]


def test_cells_use_first_level_as_minus_one():
    d = design_from_generators([("codec", ["zlib", "lzma"]), ("level", ["1", "9"]),
                                ("threads", ["1", "4"])], ["threads = codec*level"])
    cells = d.cells()
    assert {"codec": "zlib", "level": "1", "threads": "4"} in cells   # (-1)(-1) = +1
    assert {"codec": "lzma", "level": "1", "threads": "1"} in cells


def test_names_and_letters_parse_to_the_same_design():
    names = ["threads", "batch", "cache", "pin"]
    f = two_level(names)
    a = design_from_generators(f, ["pin = threads*batch*cache"])
    b = design_from_generators(f, ["D = ABC"])
    assert a.coded_cells() == b.coded_cells()
    c = design_from_generators(f, ["pin = threads:batch:cache"])
    assert c.defining_words() == ["ABCD"]


def test_a_factor_may_be_named_I():
    # Letters are positions (I is skipped as a letter), so a factor may be called I.
    f = two_level(["x", "y", "z", "I"])
    d = design_from_generators(f, ["I = x*y*z"])
    assert d.defining_words() == ["ABCD"]
    d2 = design_from_generators(f, ["D = ABC"])
    assert d2.defining_words() == ["ABCD"]
    assert d.defining_relation_text() == "I = ABCD"


def test_letters_take_precedence_over_single_letter_names():
    # Factor named "D" listed first: "D = BC" in letters means the 4th factor.
    f = two_level(["D", "B", "C", "X"])
    pos, mask, sign = parse_generator("D = BC", [n for n, _ in f])
    assert pos == 3 and mask == 0b0110
    # With '*' the tokens are names: D is the first factor, generated from B and C... of names.
    pos, mask, sign = parse_generator("X = D*B", [n for n, _ in f])
    assert pos == 3 and mask == 0b0011


@pytest.mark.parametrize("gen, fragment", [
    ("D = AE", "letter E names no factor"),
    ("D = A", "at least two"),
    ("D = ABD", "also appears on the right"),
    ("D ABC", "NEW = PRODUCT"),
    ("DA = BC", "must be one factor"),
    ("speed = A*B", "not a factor"),
    ("I = ABC", "identity"),
])
def test_bad_generators_are_clear(gen, fragment):
    with pytest.raises(DesignError, match=fragment):
        design_from_generators(letters(4), [gen])


def test_generated_factor_cannot_be_used_in_another_generator():
    with pytest.raises(DesignError, match="itself generated"):
        design_from_generators(letters(5), ["D = ABC", "E = AD"])


@pytest.mark.parametrize("gens", [["D = AB", "E = AB"], ["D = AB", "E = -AB"]])
def test_two_generators_with_one_product_are_refused(gens):
    # D = AB and E = AB give D and E one column (the defining word DE has length 2):
    # resolution II, two main effects that can never be told apart (common practice).
    with pytest.raises(DesignError, match="share one column"):
        design_from_generators(letters(5), gens)


def test_only_two_level_factors():
    with pytest.raises(DesignError, match="3 levels"):
        design_from_generators([("a", ["1", "2", "3"]), ("b", ["x", "y"]), ("c", ["p", "q"])],
                               ["c = a*b"])


def _minimum_wlp_brute_force(k, p):
    """Smallest word-length pattern over every generator set (exhaustive, small sizes)."""
    nb = k - p
    cands = [m for m in range(1, 2 ** nb) if W.order(m) >= 2]
    best = None
    for combo in itertools.combinations(cands, p):
        words = W.group([(c | (1 << (nb + j)), 1) for j, c in enumerate(combo)])
        wlp = W.word_length_pattern(words, k)
        if best is None or wlp < best:
            best = wlp
    return best


@pytest.mark.parametrize("k, cells, resolution, wlp_from3", [
    # Montgomery Table 8.14 / BHH (from memory): resolutions and word-length patterns.
    (7, 8, 3, (7, 7, 0, 0, 1)),
    (5, 16, 5, (0, 0, 1)),
    (6, 16, 4, (0, 3, 0, 0)),
    (4, 8, 4, (0, 1)),
    (7, 16, 4, (0, 7, 0, 0, 0)),
])
def test_automatic_choice_matches_standard_designs(k, cells, resolution, wlp_from3):
    d = design_for_cells(letters(k), cells)
    assert d.resolution == resolution
    assert d.word_length_pattern[2:] == wlp_from3
    assert d.search["exhaustive"]


@pytest.mark.parametrize("k, p", [(6, 2), (7, 3), (8, 4), (7, 2), (8, 3), (9, 4), (9, 3)])
def test_automatic_choice_is_minimum_aberration(k, p):
    # Cross-check of the branch and bound against a plain exhaustive enumeration.
    d = design_for_cells(letters(k), 2 ** (k - p))
    assert d.word_length_pattern == _minimum_wlp_brute_force(k, p)


@pytest.mark.parametrize("k, resolution, cells", [
    # Smallest fractions of a given resolution (Montgomery Table 8.14, from memory).
    (5, 5, 16), (6, 4, 16), (7, 4, 16), (8, 4, 16), (8, 5, 64), (7, 3, 8), (6, 6, 32),
])
def test_resolution_request_gives_smallest_fraction(k, resolution, cells):
    d = design_for_resolution(letters(k), resolution)
    assert d.n_cells == cells
    assert d.resolution >= resolution


def test_resolution_beyond_any_fraction_falls_back_to_full():
    d = design_for_resolution(letters(4), 5)
    assert not d.is_fraction and d.n_cells == 16


def test_cells_errors():
    with pytest.raises(DesignError, match="power of two"):
        design_for_cells(letters(5), 12)
    with pytest.raises(DesignError, match="at least k\\+1"):
        design_for_cells(letters(9), 8)


def test_larger_search_stays_quick_and_valid():
    import time

    t = time.perf_counter()
    d = design_for_cells(two_level([f"x{i}" for i in range(12)]), 64)
    assert time.perf_counter() - t < 10
    assert d.resolution == 4 and d.n_cells == 64


def test_json_dict_and_describe():
    d = design_for_cells(letters(6), 16)
    j = d.to_json_dict()
    assert j["resolution"] == 4 and j["cells"] == 16 and len(j["defining_relation"]) == 3
    assert set(j["aliases"]) >= {"A", "AB"}
    text = "\n".join(d.describe())
    assert "resolution IV" in text and "defining relation: I = " in text
    assert full_design(letters(3)).resolution is None


@pytest.mark.slow
@pytest.mark.parametrize("k, p", [(10, 4), (11, 6)])
def test_automatic_choice_is_minimum_aberration_larger(k, p):
    d = design_for_cells(letters(k), 2 ** (k - p))
    assert d.search["exhaustive"]
    assert d.word_length_pattern == _minimum_wlp_brute_force(k, p)

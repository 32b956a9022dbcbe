"""Effect words of two-level designs: bit masks over factor positions.

A *word* names a main effect or interaction of two-level factors as the set of
factors it multiplies (``ABD`` = the A×B×D interaction). We hold a word as an
integer bit mask (bit i = the i-th listed factor) and a sign, so the product
of two words is the exclusive-or of their masks (A·A = I) and the product of
their signs. This is the algebra of defining relations and aliases in Box &
Hunter (1961), "The 2^(k-p) fractional factorial designs", and Montgomery,
*Design and Analysis of Experiments*, ch. 8.

Letters are positions, not names: ``A`` is the first listed factor, ``B`` the
second, and so on, skipping ``I`` (common practice, so the identity word ``I``
is never a factor letter): A..H, J..Z, at most 25 factors. A factor may still
be *named* ``I``; names are used with ``*`` (``cache = threads*batch``).
"""

from __future__ import annotations

LETTERS = "ABCDEFGHJKLMNOPQRSTUVWXYZ"  # no I: the identity word
MAX_FACTORS = len(LETTERS)


def order(mask: int) -> int:
    """Number of factors in a word (1 = main effect, 2 = two-factor interaction...)."""
    return bin(mask).count("1")


def positions(mask: int) -> list[int]:
    """Factor positions in a word, ascending."""
    out = []
    i = 0
    while mask:
        if mask & 1:
            out.append(i)
        mask >>= 1
        i += 1
    return out


def letters(mask: int) -> str:
    """``0b1011`` -> ``ABD``; the empty word is ``I``."""
    if mask == 0:
        return "I"
    return "".join(LETTERS[i] for i in positions(mask))


def signed_letters(mask: int, sign: int) -> str:
    return ("-" if sign < 0 else "") + letters(mask)


def term(mask: int, names) -> str:
    """Wilkinson-Rogers term of a word: ``threads:batch`` in listed factor order."""
    return ":".join(names[i] for i in positions(mask))


def sort_key(mask: int) -> tuple:
    """Order words by order, then by the positions of their letters (A, B, ..., AB, AC, ...)."""
    return (order(mask), positions(mask))


def group(generators) -> list[tuple[int, int]]:
    """All products of the given (mask, sign) words except the identity.

    For p independent words this is the 2^p - 1 non-identity words of the
    subgroup they generate (the defining relation of a fraction, or the
    effects confounded with blocks).
    """
    words: list[tuple[int, int]] = []
    for mask, sign in generators:
        new = [(mask, sign)] + [(mask ^ m, sign * s) for m, s in words]
        words.extend(new)
    return words


def word_length_pattern(words, k: int) -> tuple[int, ...]:
    """Counts of words of length 1, 2, ..., k (index 0 = length 1)."""
    counts = [0] * k
    for mask, _sign in words:
        counts[order(mask) - 1] += 1
    return tuple(counts)

"""Branch-and-bound search for minimum-aberration word sets.

Both choosing the generators of a 2^(k-p) fraction (Fries & Hunter 1980,
"Minimum aberration 2^(k-p) designs") and choosing the effects confounded with
2^q blocks come down to the same question: among sets of independent words,
which one generates a group whose pattern of word orders (counts of words of
order 1, 2, 3, ...) is smallest in lexicographic order? The smallest pattern
has the highest lowest order (resolution), and among those the fewest words of
that order (aberration).

We search sets of candidates in a fixed order (highest-order candidates first,
so a good set is found early) and prune a partial set as soon as its pattern is
no better than the best complete set: adding words only adds counts, so the
final pattern of any extension is at least the partial one. A node limit keeps
planning interactive; the result says whether the search was exhaustive.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable, Sequence

DEFAULT_NODE_LIMIT = 2_000_000   # words formed (about a second or two of Python)


@dataclass(frozen=True)
class SearchResult:
    chosen: tuple[int, ...]        # chosen candidates, in search order
    pattern: tuple[int, ...]       # counts of group words of order 1..k
    exhaustive: bool               # False when the node limit stopped the search
    nodes: int                     # work done: group words formed


def best_word_set(candidates: Sequence[int], depth: int, k: int,
                  make_word: Callable[[int, int], int],
                  order_of: Callable[[int], int],
                  min_order: int,
                  node_limit: int = DEFAULT_NODE_LIMIT,
                  symmetric: bool = False) -> SearchResult | None:
    """Choose ``depth`` candidates whose generated group has the smallest order pattern.

    ``make_word(j, candidate)`` turns the j-th chosen candidate into its group
    word (a bit mask); ``order_of(mask)`` is the order the pattern counts (0 for
    the identity, which means the chosen words are not independent). Every
    group word must have order >= ``min_order``. Returns None when no set meets
    the constraint; an empty ``chosen`` with ``exhaustive=False`` when the node
    limit stopped the search before any complete set was found.

    ``symmetric``: the candidates are every word (of the allowed orders) over
    some factors, sorted by descending order then positions, and the pattern
    does not change when those factors are permuted (a fraction's basic factors;
    a full factorial's factors when blocking). Then any set can be permuted so
    that its highest-order word becomes the first candidate of that order, which
    is also the set's first element in search order; so the first choice need
    only range over the first candidate of each order (isomorphism pruning).
    """
    best_pattern: tuple[int, ...] | None = None
    best_chosen: tuple[int, ...] = ()
    nodes = 0
    exhaustive = True
    n = len(candidates)

    def rec(start: int, chosen: list[int], words: list[int], pattern: list[int]) -> None:
        nonlocal best_pattern, best_chosen, nodes, exhaustive
        j = len(chosen)
        for idx in range(start, n - (depth - j) + 1):
            if j == 0 and first_only is not None and idx not in first_only:
                continue
            if nodes >= node_limit:
                exhaustive = False
                return
            nodes += 1 + len(words)
            w = make_word(j, candidates[idx])
            new = [w] + [w ^ m for m in words]
            orders = [order_of(m) for m in new]
            if min(orders) < max(min_order, 1):
                continue
            pat = list(pattern)
            for o in orders:
                pat[o - 1] += 1
            tpat = tuple(pat)
            if j + 1 == depth:
                if best_pattern is None or tpat < best_pattern:
                    best_pattern = tpat
                    best_chosen = tuple(chosen + [candidates[idx]])
                continue
            if best_pattern is not None and tpat >= best_pattern:
                continue
            rec(idx + 1, chosen + [candidates[idx]], words + new, pat)
            if not exhaustive:
                return

    if depth == 0:
        return SearchResult((), tuple([0] * k), True, 0)
    first_only = None
    if symmetric:
        first_only = set()
        seen_orders = set()
        for idx, c in enumerate(candidates):
            o = bin(c).count("1")
            if o not in seen_orders:
                seen_orders.add(o)
                first_only.add(idx)
    greedy = _greedy(candidates, depth, k, make_word, order_of, min_order)
    if greedy is not None:
        best_chosen, best_pattern = greedy
    rec(0, [], [], [0] * k)
    if best_pattern is None:
        if exhaustive:
            return None
        return SearchResult((), (), False, nodes)   # gave up before any complete set
    return SearchResult(best_chosen, best_pattern, exhaustive, nodes)


def _greedy(candidates, depth, k, make_word, order_of, min_order):
    """One pass picking, at each step, the candidate with the smallest partial pattern.

    Gives the branch and bound a good first bound (so it prunes hard from the
    start) and a complete answer even when the node limit stops the search.
    """
    chosen: list[int] = []
    words: list[int] = []
    pattern = [0] * k
    used: set[int] = set()
    for j in range(depth):
        best = None
        for idx, c in enumerate(candidates):
            if idx in used:
                continue
            w = make_word(j, c)
            new = [w] + [w ^ m for m in words]
            orders = [order_of(m) for m in new]
            if min(orders) < max(min_order, 1):
                continue
            pat = list(pattern)
            for o in orders:
                pat[o - 1] += 1
            if best is None or pat < best[0]:
                best = (pat, idx, new)
        if best is None:
            return None
        pattern, idx, new = best
        used.add(idx)
        chosen.append(idx)
        words.extend(new)
    # The search enumerates candidate sets in index order; report in that order.
    order = sorted(range(depth), key=lambda j: chosen[j])
    if [chosen[j] for j in order] != chosen:
        # make_word may depend on the position j (a fraction's generated factor):
        # recompute the pattern for the sorted assignment, which is what the
        # search would produce for this set.
        srt = sorted(chosen)
        ws: list[int] = []
        pat = [0] * k
        for j, idx in enumerate(srt):
            w = make_word(j, candidates[idx])
            new = [w] + [w ^ m for m in ws]
            for m in new:
                o = order_of(m)
                if o < max(min_order, 1):
                    return None
                pat[o - 1] += 1
            ws.extend(new)
        return tuple(candidates[i] for i in srt), tuple(pat)
    return tuple(candidates[i] for i in chosen), tuple(pattern)

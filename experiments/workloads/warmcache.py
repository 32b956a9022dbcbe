#!/usr/bin/env python3
"""Demo workload: a catalogue lookup service with a read-through cache.

Each request asks for one product page by id; a miss renders the page from the
slow "backend" (hashing the product record a few rounds stands in for a
database query and templating), a hit serves it from an LRU cache.  The cache
starts empty, so the first batches are slow and latency falls as it fills: a
visible warm-up.  Request ids follow either a skewed popularity law
(``--mix skewed``: a few best-sellers get most traffic) or are uniform
(``--mix uniform``).

Output (stdout): one JSON line per batch ``{"batch": i, "batch_ms": ...,
"hits": ...}``, then a summary line with ``throughput_rps``, ``hit_ratio`` and
a ``checksum`` of every page served (the same with or without a cache: a
cache that served wrong pages would change it).  stderr gets one human line.
"""

from __future__ import annotations

import argparse
import bisect
import hashlib
import json
import random
import sys
import time
from collections import OrderedDict


def popularity_table(keys: int, mix: str, skew: float = 1.1) -> list[float]:
    """Cumulative weights for drawing product ids."""
    if mix == "uniform":
        weights = [1.0] * keys
    else:
        weights = [1.0 / (rank + 1) ** skew for rank in range(keys)]
    total, cum = 0.0, []
    for w in weights:
        total += w
        cum.append(total)
    return [c / total for c in cum]


def render_page(pid: int, rounds: int) -> bytes:
    """The slow path: build the page for product ``pid``."""
    data = f"product {pid}; price {pid % 97}.99; stock {pid * 7 % 13}".encode() * 64
    for _ in range(rounds):
        data = hashlib.sha256(data).digest() * 128
    return hashlib.sha256(data).digest()


def serve(page: bytes) -> bytes:
    """The fast path every request pays: sign the page for the response."""
    body = page * 256
    return hashlib.sha256(body).digest()


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--cache-size", type=int, required=True, help="cache entries (0: no cache)")
    ap.add_argument("--mix", choices=("skewed", "uniform"), required=True)
    ap.add_argument("--products", type=int, default=600)
    ap.add_argument("--batches", type=int, default=200)
    ap.add_argument("--batch-size", type=int, default=100)
    ap.add_argument("--rounds", type=int, default=6, help="backend cost per miss")
    ap.add_argument("--seed", type=int, default=1)
    args = ap.parse_args(argv)

    rng = random.Random(args.seed)
    cum = popularity_table(args.products, args.mix)
    cache: OrderedDict[int, bytes] = OrderedDict()
    checksum = hashlib.sha256()
    total_hits = 0
    clock = time.perf_counter
    t_start = clock()
    for b in range(args.batches):
        ids = [bisect.bisect_left(cum, rng.random()) for _ in range(args.batch_size)]
        hits = 0
        t0 = clock()
        for pid in ids:
            page = cache.get(pid)
            if page is not None:
                cache.move_to_end(pid)
                hits += 1
            else:
                page = render_page(pid, args.rounds)
                if args.cache_size > 0:
                    cache[pid] = page
                    if len(cache) > args.cache_size:
                        cache.popitem(last=False)
            checksum.update(serve(page))
        dt = clock() - t0
        total_hits += hits
        print(json.dumps({"batch": b, "batch_ms": round(dt * 1e3, 6), "hits": hits}))
    elapsed = clock() - t_start
    requests = args.batches * args.batch_size
    summary = {"requests": requests, "throughput_rps": round(requests / elapsed, 3),
               "hit_ratio": round(total_hits / requests, 6),
               "checksum": checksum.hexdigest()[:16]}
    print(json.dumps(summary))
    print(f"served {requests} requests at {requests / elapsed:.1f} requests/s "
          f"({100 * total_hits / requests:.1f}% from cache)", file=sys.stderr)
    return 0


if __name__ == "__main__":
    sys.exit(main())

#!/usr/bin/env python3
"""Demo workload: a log spooler flushing batches of records to disk.

The spooler collects records in a buffer of ``--buffer-kib`` KiB and hands full
buffers to ``--workers`` flushing threads. A stand-in for a real service whose
cost model we know exactly, so the response-surface demo has a planted answer:

* small buffers flush too often (each flush pays a fixed cost); large ones
  spill out of the CPU cache and every copy slows down. In between is a best
  size, about 90 KiB.
* one or two workers leave the disk idle between flushes; many workers fight
  over the spool lock. About 4 workers is best.
* the two interact a little: a larger buffer wants slightly fewer workers.

With u = log2(buffer_kib / 64) / 2 (so 16 KiB is -1 and 256 KiB is +1) and
w = (workers - 5) / 3 (2 workers is -1, 8 is +1), one batch takes

    t = 0.60 s * exp(0.35 (u - 0.25)^2 + 0.25 (w + 0.3)^2 + 0.10 (u - 0.25)(w + 0.3))

times a little random noise (3% on the log scale), spent sleeping: the
spooler's work is modelled, not done. The optimum is at buffer_kib = 64 *
2^0.5 = 90.5 and workers = 5 - 0.9 = 4.1. Standard library only.
"""

from __future__ import annotations

import argparse
import json
import math
import random
import sys
import time

BASE_S = 0.60


def batch_seconds(buffer_kib: float, workers: float) -> float:
    """The modelled time of one batch (no noise)."""
    u = math.log2(buffer_kib / 64) / 2 - 0.25
    w = (workers - 5) / 3 + 0.3
    return BASE_S * math.exp(0.35 * u * u + 0.25 * w * w + 0.10 * u * w)


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--buffer-kib", type=float, required=True)
    p.add_argument("--workers", type=float, required=True)
    p.add_argument("--noise", type=float, default=0.03, help="sd of the noise on ln(time)")
    a = p.parse_args(argv)
    if a.buffer_kib <= 0 or a.workers < 1:
        print("spool: --buffer-kib must be positive and --workers at least 1", file=sys.stderr)
        return 2
    t = batch_seconds(a.buffer_kib, a.workers) * math.exp(random.gauss(0.0, a.noise))
    time.sleep(t)
    print(json.dumps({"buffer_kib": a.buffer_kib, "workers": a.workers,
                      "modelled_s": round(t, 6)}))
    return 0


if __name__ == "__main__":
    sys.exit(main())

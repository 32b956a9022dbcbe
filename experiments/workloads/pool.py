#!/usr/bin/env python3
"""Demo workload: a batch job that splits its records over a pool of worker threads.

A model of a parallel program whose time follows a formula, so a scaling study
has a known answer. For ``--records n`` and ``--threads p`` the job's work is
``W = BASE_S · (n / 100000) ** GROWTH`` seconds; a share ``SERIAL`` of it runs
on one thread (reading and merging), the rest is split evenly over the ``p``
threads, which run at once. So the job takes

    W · (SERIAL + (1 − SERIAL) / p)      (Amdahl's law, with serial fraction SERIAL)

times a little multiplicative noise (3%, log-normal). The workers wait instead
of computing (``time.sleep``), so the machine's own core count does not cap the
speed-up: the formula holds on a 2-core laptop as on a 64-core server.

Output (stdout): one JSON line ``{"work_s": ..., "records": n, "threads": p}``,
where ``work_s`` is the job's own time, measured inside the process (without the
interpreter's start-up, which is serial work of its own in ``wall_s``).
"""

from __future__ import annotations

import argparse
import json
import math
import random
import threading
import time

BASE_S = 0.25     # work at 100,000 records
GROWTH = 1.25     # the work grows as records ** GROWTH
SERIAL = 0.10     # the share of the work that runs on one thread
NOISE = 0.03      # standard deviation of the log of the run's time


def until(deadline: float) -> None:
    """Wait until ``deadline`` (perf_counter seconds): a deadline, not a duration, so the
    cost of starting threads on a busy machine is not added to the formula's time."""
    while True:
        left = deadline - time.perf_counter()
        if left <= 0:
            return
        time.sleep(left)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--records", type=int, required=True)
    ap.add_argument("--threads", type=int, required=True)
    args = ap.parse_args()
    if args.records < 1 or args.threads < 1:
        ap.error("--records and --threads must be at least 1")
    start = time.perf_counter()
    work = BASE_S * (args.records / 100_000) ** GROWTH * math.exp(random.gauss(0.0, NOISE))
    serial_end = start + SERIAL * work                          # the serial part
    finish = serial_end + (1.0 - SERIAL) * work / args.threads  # then every share at once
    until(serial_end)
    pool = [threading.Thread(target=until, args=(finish,)) for _ in range(args.threads)]
    for t in pool:
        t.start()
    for t in pool:
        t.join()
    print(json.dumps({"work_s": round(time.perf_counter() - start, 6),
                      "records": args.records, "threads": args.threads}))


if __name__ == "__main__":
    main()

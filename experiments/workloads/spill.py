"""Demo workload: a query engine spilling a sort run to disk, with or without compression.

Part of the spill-codecs demo experiment (an excluded combination and a
conditional factor: ``level`` means nothing when ``codec`` is ``none``).
Standard library only. The time it takes follows a formula, so the analysis
has a known truth to recover:

    time = BASE_MS[codec] * LEVEL_FACTOR[codec][level] * ROWS_FACTOR[rows] * noise

with noise log-normal (3% spread); it reports the time of the spill itself as
``spill_ms`` (the experiment's metric; the process start-up around it varies
far more on a busy machine than the spill does). It refuses a ``--level`` for ``none`` and
needs one for every other codec, which shows that the argument is left out
where the factor does not apply. Prints one JSON line.
"""

import argparse
import json
import math
import random
import sys
import time

BASE_MS = {"none": 30.0, "zlib": 20.0, "lzma": 24.0}
LEVEL_FACTOR = {"zlib": {"1": 1.0, "6": 1.3, "9": 1.8},
                "lzma": {"1": 1.2, "6": 2.0, "9": 3.0}}
ROWS_FACTOR = {"small": 1.0, "large": 2.0}


def main() -> int:
    p = argparse.ArgumentParser()
    p.add_argument("--codec", choices=sorted(BASE_MS), required=True)
    p.add_argument("--level", choices=["1", "6", "9"])
    p.add_argument("--rows", choices=sorted(ROWS_FACTOR), required=True)
    a = p.parse_args()
    if a.codec == "none" and a.level is not None:
        print("spill.py: --level makes no sense without a codec", file=sys.stderr)
        return 2
    if a.codec != "none" and a.level is None:
        print(f"spill.py: --codec {a.codec} needs --level", file=sys.stderr)
        return 2
    ms = BASE_MS[a.codec] * ROWS_FACTOR[a.rows]
    if a.codec != "none":
        ms *= LEVEL_FACTOR[a.codec][a.level]
    ms *= math.exp(random.gauss(0.0, 0.03))
    t0 = time.perf_counter()
    time.sleep(ms / 1000.0)           # stands in for compressing and writing the run
    spill_ms = (time.perf_counter() - t0) * 1000.0
    print(json.dumps({"codec": a.codec, "level": a.level, "rows": a.rows,
                      "spill_ms": round(spill_ms, 3)}))
    return 0


if __name__ == "__main__":
    sys.exit(main())

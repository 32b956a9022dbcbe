"""Demo workload: compress a generated corpus with one codec at one level.

Part of the archive-codecs demo experiment (a log archiver choosing its codec).
Standard library only. Prints one JSON line: bytes in/out and throughput.
"""

import argparse
import bz2
import json
import lzma
import random
import time
import zlib


def corpus(kind: str, size: int) -> bytes:
    rng = random.Random(20261201)
    if kind == "text":
        words = ["GET", "POST", "/api/v1/items", "/healthz", "200", "404", "503", "user=",
                 "latency_ms=", "cache=hit", "cache=miss", "region=eu-west", "region=us-east"]
        out = []
        n = 0
        i = 0
        while n < size:
            line = (f"2026-11-{1 + i % 28:02d}T12:{i % 60:02d}:{(i * 7) % 60:02d}Z "
                    + " ".join(rng.choice(words) for _ in range(8))
                    + f" {rng.randint(1, 999)}\n")
            out.append(line)
            n += len(line)
            i += 1
        return "".join(out).encode()[:size]
    # "binary": sensor-like records, partly random, partly repetitive
    buf = bytearray()
    while len(buf) < size:
        buf += rng.randbytes(48) + bytes(16) + (len(buf) % 251).to_bytes(2, "little") * 8
    return bytes(buf[:size])


def main() -> None:
    p = argparse.ArgumentParser()
    p.add_argument("--codec", choices=["zlib", "bz2", "lzma"], required=True)
    p.add_argument("--level", type=int, required=True)
    p.add_argument("--input", choices=["text", "binary"], required=True)
    p.add_argument("--size-kib", type=int, default=384)
    a = p.parse_args()
    data = corpus(a.input, a.size_kib * 1024)
    t0 = time.perf_counter()
    if a.codec == "zlib":
        out = zlib.compress(data, a.level)
    elif a.codec == "bz2":
        out = bz2.compress(data, a.level)
    else:
        out = lzma.compress(data, preset=a.level)
    dt = time.perf_counter() - t0
    print(json.dumps({"bytes_in": len(data), "bytes_out": len(out),
                      "ratio": round(len(data) / len(out), 4),
                      "mib_per_s": round(len(data) / 2**20 / dt, 3)}))


if __name__ == "__main__":
    main()

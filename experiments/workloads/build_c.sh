#!/bin/sh
# Build step of the c-opt-levels demo: compile sumsq.c at one optimisation level.
# Says clearly and fails (so the runs of that cell are recorded as failed, with
# this message) when the machine has no C compiler.
set -e
opt="$1"
out="$2"
for c in "${CC:-}" cc gcc clang; do
  if [ -n "$c" ] && command -v "$c" >/dev/null 2>&1; then
    mkdir -p "$(dirname "$out")"
    exec "$c" "-O$opt" -o "$out" experiments/workloads/sumsq.c
  fi
done
echo "no C compiler found (tried \$CC, cc, gcc, clang); install one to run this demo" >&2
exit 1

#!/bin/sh
# Every fuzz corpus input (seeds, and the regress-* inputs of fixed
# findings) through its harness, built with the project's compiler by the
# replay driver (tests/fuzz/replay.c): under make sanitize this is the
# regression test of each finding with AddressSanitizer and UBSan.
set -eu
bindir=$(dirname "$CLEF_BIN")
top=$(cd "$(dirname "$0")/../.." && pwd)
n=0
for src in "$top"/tests/fuzz/fuzz_*.c; do
    h=$(basename "$src" .c)
    bin="$bindir/fuzz-replay/$h"
    [ -x "$bin" ] || { echo "missing $bin (make tests builds it)"; exit 1; }
    out=$(OMP_NUM_THREADS=1 "$bin" "$top/tests/fuzz/corpus/$h")
    echo "ok: $h: $out"
    n=$((n + 1))
done
[ "$n" -gt 0 ]
echo "all $n fuzz corpora replayed"

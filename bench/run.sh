#!/bin/sh
# Run every benchmark program build/bench/bench_* in turn (each writes
# bench/results-<name>.json), then merge them into bench/results.json.
# Usage: sh bench/run.sh [build-dir]
BUILD=${1:-build}
top=$(cd "$(dirname "$0")/.." && pwd)
cd "$top" || exit 2
status=0
for b in "$BUILD"/bench/bench_*; do
    [ -x "$b" ] || continue
    echo "== $(basename "$b")"
    "$b" || { echo "$(basename "$b") failed"; status=1; }
done
# The Python module's overhead over the library (docs/python.md).
if ls "$BUILD"/python/clef/_clef*.so >/dev/null 2>&1; then
    echo "== python_spectrum"
    PYTHONPATH="$BUILD/python" /usr/bin/python3 bench/python_spectrum.py ||
        { echo "python_spectrum failed"; status=1; }
fi
echo "== ensemble (clef sims)"
sh bench/ensemble.sh "$BUILD" || { echo "ensemble failed"; status=1; }
/usr/bin/python3 - <<'PY' || status=1
import glob, json, os
merged = {}
for path in sorted(glob.glob("bench/results-*.json")):
    name = os.path.basename(path)[len("results-"):-len(".json")]
    with open(path) as f:
        merged[name] = json.load(f)
tmp = "bench/results.json.tmp"
with open(tmp, "w") as f:
    json.dump(merged, f, indent=1)
    f.write("\n")
os.replace(tmp, "bench/results.json")
print("bench/results.json:", ", ".join(sorted(merged)) or "(no results)")
PY
exit $status

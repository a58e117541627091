#!/bin/sh
# clef sims throughput: realisations per hour at nside 512 (and 1024 with
# BENCH_ENSEMBLE_1024=1; BENCH_ENSEMBLE_SIZES and BENCH_ENSEMBLE_N choose)
# for 1 rank x 2 threads and, when clef has MPI and mpirun is there, 2 ranks
# x 1 thread; and the ensemble's overhead over the hand-written loop it
# replaces, N x (clef simulate + clef spectrum) with the same options and a
# warm coupling cache, run the same way: one loop of 2 threads against 1
# rank x 2 threads, two concurrent loops of 1 thread (realisation i on loop
# i mod 2) against 2 ranks x 1 thread.  Ratios of one run (the machine is
# shared): bench/results-ensemble.json.  BENCH_ENSEMBLE_BASE=/path/to/clef
# also times another build's clef sims the same way (rows "base": before and
# after a change, in one run).  Usage: sh bench/ensemble.sh [build-dir]
BUILD=${1:-build}
C="$(cd "$(dirname "$0")/.." && pwd)/$BUILD/clef"
T=$(mktemp -d "${TMPDIR:-/tmp}/clef-bench-ens-XXXXXX")
trap 'rm -rf "$T"' EXIT
export CLEF_CACHE_DIR="$T/cache" OMPI_ALLOW_RUN_AS_ROOT=1 OMPI_ALLOW_RUN_AS_ROOT_CONFIRM=1
N=${BENCH_ENSEMBLE_N:-8}
sizes=${BENCH_ENSEMBLE_SIZES:-512}
[ -n "${BENCH_ENSEMBLE_1024:-}" ] && sizes="512 1024"
mpi=0
command -v mpirun >/dev/null 2>&1 && "$C" sims --help | grep -q "^This clef: MPI yes" && mpi=1
now() { date +%s.%N; }
out="$T/res.txt"; : > "$out"
# loop NS J R: realisations J, J+R, ... < N by clef simulate + clef spectrum
loop() {
    i=$2
    while [ $i -lt $N ]; do
        "$C" simulate --quiet --nside $1 --model --seed $i --beam-fwhm 10 --noise-depth 20 \
            --output "$T/s$2.fits"
        "$C" spectrum "$T/s$2.fits" $OPTS --quiet -o "$T/sbp$2" --format fits
        i=$((i + $3))
    done
}
for ns in $sizes; do
    "$C" mask --quiet --nside $ns --latitude-cut 20 --taper c2 --taper-width 5 --output "$T/mask$ns.fits"
    OPTS="--mask $T/mask$ns.fits --beam-fwhm 10 --no-peak"
    # warm the coupling cache (both paths then read it, as a user's second run would)
    "$C" simulate --quiet --nside $ns --model --seed 1 --beam-fwhm 10 --noise-depth 20 --output "$T/w.fits"
    OMP_NUM_THREADS=2 "$C" spectrum "$T/w.fits" $OPTS --quiet -o "$T/wbp" --format fits
    # the hand-written loop, 2 threads
    t0=$(now)
    (export OMP_NUM_THREADS=2; loop $ns 0 1)
    t1=$(now)
    echo "loop $ns 1 2 $(echo "$t1 - $t0" | bc -l)" >> "$out"
    t0=$(now)
    OMP_NUM_THREADS=2 "$C" sims --run "$T/e$ns" --simulate $N --nside $ns --model --noise-depth 20 $OPTS --quiet
    t1=$(now)
    echo "sims $ns 1 2 $(echo "$t1 - $t0" | bc -l)" >> "$out"
    cp "$T/e$ns/ensemble.json" "$T/acct-e$ns.json"
    if [ -n "${BENCH_ENSEMBLE_BASE:-}" ]; then
        t0=$(now)
        OMP_NUM_THREADS=2 "$BENCH_ENSEMBLE_BASE" sims --run "$T/b$ns" --simulate $N --nside $ns \
            --model --noise-depth 20 $OPTS --quiet
        t1=$(now)
        echo "base $ns 1 2 $(echo "$t1 - $t0" | bc -l)" >> "$out"
    fi
    if [ $mpi -eq 1 ]; then
        # two hand-written loops side by side, 1 thread each
        t0=$(now)
        (export OMP_NUM_THREADS=1; loop $ns 0 2) & p0=$!
        (export OMP_NUM_THREADS=1; loop $ns 1 2) & p1=$!
        wait $p0 $p1
        t1=$(now)
        echo "loop $ns 2 1 $(echo "$t1 - $t0" | bc -l)" >> "$out"
        t0=$(now)
        OMP_NUM_THREADS=1 mpirun -np 2 --oversubscribe "$C" sims --run "$T/m$ns" --simulate $N \
            --nside $ns --model --noise-depth 20 $OPTS --quiet
        t1=$(now)
        echo "sims $ns 2 1 $(echo "$t1 - $t0" | bc -l)" >> "$out"
        cp "$T/m$ns/ensemble.json" "$T/acct-m$ns.json"
        if [ -n "${BENCH_ENSEMBLE_BASE:-}" ]; then
            t0=$(now)
            OMP_NUM_THREADS=1 mpirun -np 2 --oversubscribe "$BENCH_ENSEMBLE_BASE" sims \
                --run "$T/bm$ns" --simulate $N --nside $ns --model --noise-depth 20 $OPTS --quiet
            t1=$(now)
            echo "base $ns 2 1 $(echo "$t1 - $t0" | bc -l)" >> "$out"
        fi
    fi
done
/usr/bin/python3 - "$out" "$N" "$T" <<'PY'
import json, sys
rows = [l.split() for l in open(sys.argv[1])]
n = int(sys.argv[2]); t = sys.argv[3]
res = {"realisations": n, "runs": []}
loop = {(r[1], r[2]): float(r[4]) for r in rows if r[0] == "loop"}
for kind, ns, ranks, thr, sec in rows:
    sec = float(sec)
    e = {"what": kind, "nside": int(ns), "ranks": int(ranks), "threads": int(thr),
         "seconds": sec, "seconds_per_realisation": sec / n,
         "realisations_per_hour": 3600.0 * n / sec}
    if kind in ("sims", "base"):
        # against the loop run the same way (1 x 2 threads, or 2 loops x 1 thread)
        e["overhead_vs_loop"] = sec / loop[(ns, ranks)] - 1.0
        if kind == "sims":
            acc = json.load(open("%s/acct-%s%s.json" % (t, "m" if ranks == "2" else "e", ns)))
            e["time_s"] = acc["accounting"]["time_s"]
    res["runs"].append(e)
    print("%-5s nside %4s %s x %s thr: %7.1f s, %6.2f s per realisation, %6.1f per hour%s" % (
        kind, ns, ranks, thr, sec, sec / n, 3600.0 * n / sec,
        ", overhead vs loop %+.1f%%" % (100 * e["overhead_vs_loop"]) if kind != "loop" else ""))
json.dump(res, open("bench/results-ensemble.json", "w"), indent=1)
PY

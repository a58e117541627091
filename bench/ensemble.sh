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
# after a change, in one run).  With MPI also 2 ranks x 1 thread with
# --no-cache (rows "cold"/"basecold": the coupling made in the run, by rank
# 0 alone since the broadcast, by every rank before it).  Each clef sims row
# records its peak RSS (/usr/bin/time: the largest process) and, from the
# accounting, what rank 0 broadcast and how long the other rank waited for
# it.  Usage: sh bench/ensemble.sh [build-dir]
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
# timed KIND NS RANKS THREADS ACCT -- command: one row with seconds and peak RSS
timed() {
    kind=$1; ns=$2; rk=$3; th=$4; acct=$5; shift 6
    t0=$(now)
    /usr/bin/time -f "%M" -o "$T/rss" "$@"
    t1=$(now)
    echo "$kind $ns $rk $th $(echo "$t1 - $t0" | bc -l) $(cat "$T/rss") $acct" >> "$out"
}
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
    echo "loop $ns 1 2 $(echo "$t1 - $t0" | bc -l) 0 -" >> "$out"
    SIM="--simulate $N --nside $ns --model --noise-depth 20 $OPTS --quiet"
    timed sims $ns 1 2 "$T/e$ns/ensemble.json" -- env OMP_NUM_THREADS=2 "$C" sims --run "$T/e$ns" $SIM
    if [ -n "${BENCH_ENSEMBLE_BASE:-}" ]; then
        timed base $ns 1 2 - -- env OMP_NUM_THREADS=2 "$BENCH_ENSEMBLE_BASE" sims --run "$T/b$ns" $SIM
    fi
    if [ $mpi -eq 1 ]; then
        # two hand-written loops side by side, 1 thread each
        t0=$(now)
        (export OMP_NUM_THREADS=1; loop $ns 0 2) & p0=$!
        (export OMP_NUM_THREADS=1; loop $ns 1 2) & p1=$!
        wait $p0 $p1
        t1=$(now)
        echo "loop $ns 2 1 $(echo "$t1 - $t0" | bc -l) 0 -" >> "$out"
        MPI="mpirun -np 2 --oversubscribe"
        timed sims $ns 2 1 "$T/m$ns/ensemble.json" -- env OMP_NUM_THREADS=1 $MPI "$C" sims --run "$T/m$ns" $SIM
        if [ -n "${BENCH_ENSEMBLE_BASE:-}" ]; then
            timed base $ns 2 1 - -- env OMP_NUM_THREADS=1 $MPI "$BENCH_ENSEMBLE_BASE" sims --run "$T/bm$ns" $SIM
        fi
        # cold: the coupling and kernel made in the run (--no-cache)
        timed cold $ns 2 1 "$T/c$ns/ensemble.json" -- env OMP_NUM_THREADS=1 $MPI "$C" sims --run "$T/c$ns" $SIM --no-cache
        if [ -n "${BENCH_ENSEMBLE_BASE:-}" ]; then
            timed basecold $ns 2 1 - -- env OMP_NUM_THREADS=1 $MPI "$BENCH_ENSEMBLE_BASE" sims --run "$T/bc$ns" $SIM --no-cache
        fi
    fi
done
/usr/bin/python3 - "$out" "$N" "$T" <<'PY'
import json, sys
rows = [l.split() for l in open(sys.argv[1])]
n = int(sys.argv[2]); t = sys.argv[3]
res = {"realisations": n, "runs": []}
loop = {(r[1], r[2]): float(r[4]) for r in rows if r[0] == "loop"}
for kind, ns, ranks, thr, sec, rss, acct in rows:
    sec = float(sec)
    e = {"what": kind, "nside": int(ns), "ranks": int(ranks), "threads": int(thr),
         "seconds": sec, "seconds_per_realisation": sec / n,
         "realisations_per_hour": 3600.0 * n / sec}
    extra = ""
    if kind != "loop":
        # against the loop run the same way (1 x 2 threads, or 2 loops x 1 thread)
        e["overhead_vs_loop"] = sec / loop[(ns, ranks)] - 1.0
        e["peak_rss_mb"] = int(rss) / 1024.0
        extra = ", overhead vs loop %+.1f%%, peak RSS %.0f MB" % (
            100 * e["overhead_vs_loop"], e["peak_rss_mb"])
    if acct != "-":
        acc = json.load(open(acct))["accounting"]
        e["time_s"] = acc["time_s"]
        d = acc["ranks_detail"]
        e["broadcast"] = [{k: r[k] for k in r if k != "realisations"} for r in d]
        if len(d) > 1:
            extra += ", pieces %.1f MB + maps %.1f MB, rank 1 waited %.2f s" % (
                1e-6 * d[1]["pieces_broadcast_bytes"], 1e-6 * d[1]["maps_broadcast_bytes"],
                d[1]["pieces_broadcast_s"])
    res["runs"].append(e)
    print("%-8s nside %4s %s x %s thr: %7.1f s, %6.2f s per realisation, %6.1f per hour%s" % (
        kind, ns, ranks, thr, sec, sec / n, 3600.0 * n / sec, extra))
json.dump(res, open("bench/results-ensemble.json", "w"), indent=1)
PY

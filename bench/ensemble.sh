#!/bin/sh
# clef sims throughput: realisations per hour at nside 512 (and 1024 with
# BENCH_ENSEMBLE_1024=1; BENCH_ENSEMBLE_SIZES and BENCH_ENSEMBLE_N choose) for 1 rank x 2 threads and, when clef has MPI and
# mpirun is there, 2 ranks x 1 thread; and the ensemble's overhead over the
# hand-written loop it replaces: N x (clef simulate + clef spectrum) with the
# same options.  Ratios of one run (the machine is shared): bench/results-
# ensemble.json.  Usage: sh bench/ensemble.sh [build-dir]
BUILD=${1:-build}
C="$(cd "$(dirname "$0")/.." && pwd)/$BUILD/clef"
T=$(mktemp -d "${TMPDIR:-/tmp}/clef-bench-ens-XXXXXX")
trap 'rm -rf "$T"' EXIT
export CLEF_CACHE_DIR="$T/cache" OMPI_ALLOW_RUN_AS_ROOT=1 OMPI_ALLOW_RUN_AS_ROOT_CONFIRM=1
N=${BENCH_ENSEMBLE_N:-6}
sizes=${BENCH_ENSEMBLE_SIZES:-512}
[ -n "${BENCH_ENSEMBLE_1024:-}" ] && sizes="512 1024"
mpi=0
command -v mpirun >/dev/null 2>&1 && "$C" sims --help | grep -q "^This clef: MPI yes" && mpi=1
now() { date +%s.%N; }
out="$T/res.txt"; : > "$out"
for ns in $sizes; do
    "$C" mask --quiet --nside $ns --latitude-cut 20 --taper c2 --taper-width 5 --output "$T/mask$ns.fits"
    OPTS="--mask $T/mask$ns.fits --beam-fwhm 10 --no-peak"
    # warm the coupling cache (both paths then read it, as a user's second run would)
    "$C" simulate --quiet --nside $ns --model --seed 1 --beam-fwhm 10 --noise-depth 20 --output "$T/w.fits"
    OMP_NUM_THREADS=2 "$C" spectrum "$T/w.fits" $OPTS --quiet -o "$T/wbp" --format fits
    # the hand-written loop, 2 threads
    t0=$(now); i=0
    while [ $i -lt $N ]; do
        OMP_NUM_THREADS=2 "$C" simulate --quiet --nside $ns --model --seed $i --beam-fwhm 10 \
            --noise-depth 20 --output "$T/s.fits"
        OMP_NUM_THREADS=2 "$C" spectrum "$T/s.fits" $OPTS --quiet -o "$T/sbp" --format fits
        i=$((i + 1))
    done
    t1=$(now)
    echo "loop $ns 1 2 $(echo "$t1 - $t0" | bc -l)" >> "$out"
    t0=$(now)
    OMP_NUM_THREADS=2 "$C" sims --run "$T/e$ns" --simulate $N --nside $ns --model --noise-depth 20 $OPTS --quiet
    t1=$(now)
    echo "sims $ns 1 2 $(echo "$t1 - $t0" | bc -l)" >> "$out"
    if [ $mpi -eq 1 ]; then
        t0=$(now)
        OMP_NUM_THREADS=1 mpirun -np 2 --oversubscribe "$C" sims --run "$T/m$ns" --simulate $N \
            --nside $ns --model --noise-depth 20 $OPTS --quiet
        t1=$(now)
        echo "sims $ns 2 1 $(echo "$t1 - $t0" | bc -l)" >> "$out"
        cp "$T/m$ns/ensemble.json" "$T/acct-m$ns.json"
    fi
    cp "$T/e$ns/ensemble.json" "$T/acct-e$ns.json"
done
/usr/bin/python3 - "$out" "$N" "$T" <<'PY'
import json, sys
rows = [l.split() for l in open(sys.argv[1])]
n = int(sys.argv[2]); t = sys.argv[3]
res = {"realisations": n, "runs": []}
loop = {r[1]: float(r[4]) for r in rows if r[0] == "loop"}
for kind, ns, ranks, thr, sec in rows:
    sec = float(sec)
    e = {"what": kind, "nside": int(ns), "ranks": int(ranks), "threads": int(thr),
         "seconds": sec, "realisations_per_hour": 3600.0 * n / sec}
    if kind == "sims":
        e["overhead_vs_loop"] = sec / loop[ns] - 1.0
        acc = json.load(open("%s/acct-%s%s.json" % (t, "m" if ranks == "2" else "e", ns)))["accounting"]
        e["time_s"] = acc["time_s"]
    res["runs"].append(e)
    print("%-5s nside %4s %s rank x %s thr: %7.1f s, %6.1f realisations/hour%s" % (
        kind, ns, ranks, thr, sec, 3600.0 * n / sec,
        ", overhead vs loop %+.1f%%" % (100 * e["overhead_vs_loop"]) if kind == "sims" else ""))
json.dump(res, open("bench/results-ensemble.json", "w"), indent=1)
PY

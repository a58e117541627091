"""Overhead of the Python module over the C library for an nside-256
spectrum (docs/python.md, target <= 1%).  Run by bench/run.sh with
/usr/bin/python3 and PYTHONPATH at build/python; writes
bench/results-python.json.

In one process and one call, clef.spectrum reports the wall time spent
inside clef_spectrum_compute (summary["timings_s"]["library_call"]); the
overhead is the rest of the call's wall time as seen from Python: argument
checks, the NaN scan and validity flags of the maps, and the conversion of
the results to numpy arrays and dicts.  Median of several calls, with the
coupling matrix from the cache (the shortest library time, so the
strictest ratio) and without it."""
import json
import os
import statistics
import sys
import tempfile
import time

import clef

NSIDE = 256
REPS = int(os.environ.get("CLEF_BENCH_PY_REPS", "7"))


def measure(m1, m2, mask, cache, cache_dir):
    tot, lib = [], []
    for _ in range(REPS):
        t0 = time.perf_counter()
        r = clef.spectrum(m1, mask, m2, unit="uK", cache=cache, cache_dir=cache_dir)
        t = time.perf_counter() - t0
        tot.append(t)
        lib.append(r["summary"]["timings_s"]["library_call"])
    over = [t - l for t, l in zip(tot, lib)]
    return {
        "cache": cache,
        "reps": REPS,
        "python_call_s_median": statistics.median(tot),
        "library_call_s_median": statistics.median(lib),
        "overhead_s_median": statistics.median(over),
        "overhead_fraction_median": statistics.median(o / l for o, l in zip(over, lib)),
        "overhead_fraction_max": max(o / l for o, l in zip(over, lib)),
        "nbins": len(r["dl"]),
    }


def main():
    cl = clef.theory_cl(lmax=3 * NSIDE - 1)
    maps = clef.simulate(NSIDE, cl, seed=11, beam_fwhm=30.0, noise_depth=20.0, splits=2)
    mask = clef.build_mask(NSIDE, latitude_cut=15, taper="c2", taper_width=5)
    with tempfile.TemporaryDirectory() as cache_dir:
        clef.spectrum(maps[0], mask, maps[1], cache_dir=cache_dir)  # fills the cache
        runs = [measure(maps[0], maps[1], mask, True, cache_dir),
                measure(maps[0], maps[1], mask, False, cache_dir)]
    print(f"{'coupling':>10} {'python s':>10} {'library s':>10} {'overhead s':>11} {'overhead':>9}")
    for r in runs:
        print(f"{'cached' if r['cache'] else 'computed':>10} {r['python_call_s_median']:10.4f} "
              f"{r['library_call_s_median']:10.4f} {r['overhead_s_median']:11.5f} "
              f"{100 * r['overhead_fraction_median']:8.3f}%")
    worst = max(r["overhead_fraction_median"] for r in runs)
    print(f"target: overhead <= 1% of the computation; worst median {100 * worst:.3f}%"
          f" ({'met' if worst <= 0.01 else 'NOT met'})")
    out = {"nside": NSIDE, "runs": runs, "worst_overhead_fraction": worst,
           "target_fraction": 0.01, "python": sys.version.split()[0]}
    tmp = "bench/results-python.json.tmp"
    with open(tmp, "w") as f:
        json.dump(out, f, indent=1)
        f.write("\n")
    os.replace(tmp, "bench/results-python.json")


if __name__ == "__main__":
    main()

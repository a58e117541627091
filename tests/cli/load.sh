#!/bin/sh
# Concurrency and load (docs/reliability.md):
#  1. 20 simultaneous `clef spectrum` runs, same map and mask, one shared and
#     initially empty cache folder: every run succeeds, every result is
#     bit-identical to a serial run's (CSV bytes, FITS columns and the JSON
#     band powers), the cache is left valid (a later run hits it with no
#     warning) and no temporary is left anywhere.
#  2. The same with every cache entry corrupted (one payload byte flipped)
#     before the 20 start: the same, and the entries are rewritten valid.
#  3. Back-to-back runs of a small job (200 with CLEF_LONG, else 50): the
#     same result every time, peak memory (ru_maxrss of each run, from
#     wait4) and open files (/proc/PID/fd, sampled while each run works)
#     not growing, nothing left behind.  The in-process counterpart (200
#     library runs, /proc/self) is tests/test_spectrum.c test_repeated_runs.
set -eu
: "${CLEF_BIN:?}" "${CLEF_PYTHON:?}" "${CLEF_TEST_TMP:?}"
T=$(mktemp -d "$CLEF_TEST_TMP/load-XXXXXX")
cd "$T"
failures=0
fail() { echo "FAIL: $*"; failures=$((failures + 1)); }
N=20
[ -n "${CLEF_SANITIZE:-}" ] && N=6   # the sanitizer build: same checks, fewer runs
export OMP_NUM_THREADS=1
temps() { find "$@" -name '*.clef-tmp.*' 2>/dev/null | wc -l; }

"$CLEF_BIN" model --lmax 400 --output cl.txt --quiet
"$CLEF_BIN" simulate --nside 128 --cl cl.txt --seed 1 --output map.fits --quiet
"$CLEF_BIN" mask --nside 128 --latitude-cut 20 --output mask.fits --quiet
run() { "$CLEF_BIN" spectrum map.fits --mask mask.fits --cache-dir "$1" -o "$2" --quiet; }
mkdir ref && run ref/cache ref/out

same_as_ref() {  # prefix
    "$CLEF_PYTHON" - "$1" <<'PY'
import json, sys
import numpy as np
from astropy.io import fits
p = sys.argv[1]
for ext in (".csv", "-cov.csv"):
    with open(p + ext) as a, open("ref/out" + ext) as b:
        x = [l for l in a if "CACHEHIT" not in l]
        y = [l for l in b if "CACHEHIT" not in l]
    assert x == y, p + ext
with fits.open(p + ".fits", checksum=True) as h, fits.open("ref/out.fits") as g:
    for c in g[1].columns.names:
        assert np.array_equal(h[1].data[c], g[1].data[c]), c
    assert np.array_equal(h[2].data, g[2].data), "covariance"
with open(p + ".json") as a, open("ref/out.json") as b:
    x, y = json.load(a), json.load(b)
assert x["spectrum"] == y["spectrum"] and x["sky"] == y["sky"], "json"
PY
}

cache_valid() {  # dir: a run on it hits and warns about nothing
    "$CLEF_BIN" spectrum map.fits --mask mask.fits --cache-dir "$1" -o check/out --verbose \
        2>check.log || { fail "run on cache $1 failed"; return; }
    grep -q "cache: hit" check.log || fail "cache $1 gave no hit"
    if grep -q "warning" check.log; then fail "cache $1: $(grep warning check.log)"; fi
}

concurrent() {  # label cachedir
    label=$1; cache=$2
    pids=""
    i=0
    while [ "$i" -lt "$N" ]; do
        mkdir -p "$label/run$i"
        run "$cache" "$label/run$i/out" 2>"$label-$i.err" & pids="$pids $!"
        i=$((i + 1))
    done
    i=0; bad=0
    for p in $pids; do
        wait "$p" || { bad=$((bad + 1)); fail "$label: run $i failed: $(cat "$label-$i.err")"; }
        i=$((i + 1))
    done
    i=0
    while [ "$i" -lt "$N" ]; do
        same_as_ref "$label/run$i/out" || fail "$label: run $i differs from the serial run"
        i=$((i + 1))
    done
    [ "$(temps "$label" "$cache")" -eq 0 ] || fail "$label: temporaries left: $(find "$label" "$cache" -name '*.clef-tmp.*')"
    mkdir -p check
    cache_valid "$cache"
    echo "ok: $label: $N simultaneous runs, $bad failed, results identical to the serial run, cache valid ($(ls "$cache" | wc -l) entries)"
}
mkdir -p c1 && concurrent empty "$PWD/c1/cache"

# 2. Every entry corrupted: one payload byte of each file flipped.
cp -r c1/cache c2
for f in c2/*.bin; do
    "$CLEF_PYTHON" -c "
import sys
b = bytearray(open(sys.argv[1], 'rb').read()); b[200] ^= 0x55
open(sys.argv[1], 'wb').write(b)" "$f"
done
concurrent corrupted "$PWD/c2"

# 3. Back-to-back runs of a small job.
"$CLEF_BIN" simulate --nside 16 --cl cl.txt --seed 3 --output small.fits --quiet
"$CLEF_BIN" mask --nside 16 --latitude-cut 10 --output smallmask.fits --quiet
reps=50; [ -n "${CLEF_LONG:-}" ] && reps=200; [ -n "${CLEF_SANITIZE:-}" ] && reps=15
mkdir -p bb
"$CLEF_PYTHON" - "$CLEF_BIN" "$reps" <<'PY' || fail "back-to-back runs"
import os, subprocess, sys, time
clef, reps = sys.argv[1], int(sys.argv[2])
cmd = [clef, "spectrum", "small.fits", "--mask", "smallmask.fits", "--cache-dir", "bb/cache",
       "-o", "bb/out", "--quiet"]
rss, fds, first = [], [], None
def is_library(pid, fd):
    # the dynamic loader briefly opens each shared library at start-up (a
    # binary linked with more libraries, e.g. MPI, shows one more now and
    # then): not a file the program keeps, so not counted
    try:
        t = os.readlink("/proc/%d/fd/%s" % (pid, fd))
    except OSError:
        return True
    return t.startswith(("/lib", "/usr/lib")) and ".so" in t
for i in range(reps):
    pid = os.posix_spawn(clef, cmd, os.environ)
    nfd = 0
    while True:                   # sample the open files while it works
        wpid, status, ru = os.wait4(pid, os.WNOHANG)
        if wpid == pid:
            break
        try:
            nfd = max(nfd, sum(1 for fd in os.listdir("/proc/%d/fd" % pid)
                               if not is_library(pid, fd)))
        except OSError:
            pass
        time.sleep(0.002)
    rc = os.waitstatus_to_exitcode(status)
    assert rc == 0, "run %d: exit %s" % (i, rc)
    with open("bb/out.csv") as f:
        text = [l for l in f if "CACHEHIT" not in l]
    first = first or text
    assert text == first, "run %d: result differs from run 0" % i
    rss.append(ru.ru_maxrss)
    fds.append(nfd)
    left = [n for r, _, fs in os.walk("bb") for n in fs if ".clef-tmp." in n]
    assert not left, "run %d left %s" % (i, left)
# Each run's peak memory (wait4's ru_maxrss) and the open files seen while
# it ran: the last fifth of the runs no higher than the first fifth (5% +
# 1 MB of slack for the allocator), i.e. nothing accumulates across runs
# (cache, temporaries, a folder growing).
q = max(reps // 5, 1)
print("runs %d: peak RSS first fifth %d-%d kB, last fifth %d-%d kB; open files first %s, last %s"
      % (reps, min(rss[:q]), max(rss[:q]), min(rss[-q:]), max(rss[-q:]),
         sorted(set(fds[:q])), sorted(set(fds[-q:]))))
assert max(rss[-q:]) <= max(rss[:q]) * 1.05 + 1024, "peak memory grew"
# The open-file count is sampled every 2 ms, so a run may or may not be caught
# while it holds one more file for a moment (seen: 6 in the first fifth, 6 or
# 7 in the last).
# Medians still flip between 5 and 6 (seen in CI); one file of slack over the
# first fifth's highest count, which anything accumulating over 50 runs exceeds.
assert max(fds[-q:]) <= max(fds[:q]) + 1, "open files grew"
PY

[ "$failures" -eq 0 ] || { echo "$failures load check(s) failed"; exit 1; }
echo "all load checks passed"

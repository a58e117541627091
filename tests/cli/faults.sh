#!/bin/sh
# Faults a cluster produces, survived by clef spectrum and clef simulate
# (docs/reliability.md):
#  1. SIGKILL at 20 pseudo-random points of each command: every final output
#     present afterwards is complete (astropy verifies the FITS CHECKSUM and
#     the data equal an uninterrupted run's; CSV equal byte for byte; JSON
#     parses); the next run removes the stale temporaries the killed ones left.
#  2. Stale temporaries: of this host and a dead pid removed, of a live pid or
#     another host kept.
#  3. SIGTERM and SIGINT while a temporary exists: exit by the signal (shell
#     status 143 / 130), temporaries removed, no output.
#  4. Disk full (a 200 kB tmpfs, as root in a private mount namespace; skipped
#     with a message otherwise), read-only output folder (read-only bind
#     mount as root, else mode 555), output folder deleted during the run:
#     exit 4, a message naming the target and the reason, nothing partial.
#  5. An input truncated or replaced while the job runs: exit 4 (or 5 if the
#     read itself saw the cut), no output.
#  6. Under ulimit -v 1 GiB: a legitimate NSIDE 8192 map is exit 8 with the
#     size asked for; a huge NSIDE over a tiny table exit 5, no allocation.
# CLEF_FAULT_TRIALS (default 20) sets the number of SIGKILL points.
set -eu
: "${CLEF_BIN:?}" "${CLEF_PYTHON:?}" "${CLEF_TEST_TMP:?}"
T=$(mktemp -d "$CLEF_TEST_TMP/faults-XXXXXX")
cd "$T"
failures=0
fail() { echo "FAIL: $*"; failures=$((failures + 1)); }
trials=${CLEF_FAULT_TRIALS:-20}
# The sanitizer build runs the same checks on fewer points (it is 2-5x slower).
[ -n "${CLEF_SANITIZE:-}" ] && trials=${CLEF_FAULT_TRIALS:-4}
export OMP_NUM_THREADS=2
host=$(hostname | tr -c 'A-Za-z0-9\n-' '-' | cut -c1-40)
[ -n "$host" ] || host=localhost
temps() { find "$@" -name '*.clef-tmp.*' 2>/dev/null | wc -l; }
now_ms() { date +%s%3N; }

"$CLEF_BIN" model --lmax 400 --output cl.txt --quiet
"$CLEF_BIN" simulate --nside 128 --cl cl.txt --seed 1 --output map.fits --quiet
"$CLEF_BIN" mask --nside 128 --latitude-cut 20 --output mask.fits --quiet
# The two jobs, as scripts (exec: the pid killed is clef's), output folder $1.
printf '#!/bin/sh\nexec "%s" spectrum map.fits --mask mask.fits --cache-dir "$1/cache" -o "$1/out" --quiet\n' \
    "$CLEF_BIN" > spec; chmod +x spec
printf '#!/bin/sh\nexec "%s" simulate --nside 256 --cl cl.txt --seed 2 --output "$1/sim.fits.gz" --alm-output "$1/alm.fits" --quiet\n' \
    "$CLEF_BIN" > simu; chmod +x simu
spec() { ./spec "$1"; }
simu() { ./simu "$1"; }

# Reference outputs and durations of uninterrupted runs (cold cache).
mkdir ref
t0=$(now_ms); spec ref; t_spec=$(( $(now_ms) - t0 ))
t0=$(now_ms); simu ref; t_simu=$(( $(now_ms) - t0 ))
rm -rf ref/cache
echo "reference runs: spectrum ${t_spec} ms, simulate ${t_simu} ms"

# complete DIR: every final output in DIR equals the reference (FITS by
# astropy with checksum verification and data comparison).
complete() {
    "$CLEF_PYTHON" - "$1" <<'PY'
import json, os, sys, warnings
import numpy as np
from astropy.io import fits
d = sys.argv[1]
warnings.simplefilter("error")
for name in sorted(os.listdir(d)):
    p, r = os.path.join(d, name), os.path.join("ref", name)
    if name.startswith(".") or not os.path.isfile(p):
        continue
    if name.endswith((".fits", ".fits.gz")):
        with fits.open(p, checksum=True) as h, fits.open(r) as g:
            assert len(h) == len(g), (name, "HDU count")
            for a, b in zip(h[1:], g[1:]):
                assert a.header.get("NAXIS2") == b.header.get("NAXIS2"), (name, "rows")
                if isinstance(b, fits.BinTableHDU):
                    for c in b.columns.names:
                        assert np.array_equal(a.data[c], b.data[c]), (name, c)
                else:
                    assert np.array_equal(a.data, b.data), (name, "image")
    elif name.endswith(".csv"):
        keep = lambda t: [l for l in t.splitlines() if "CACHEHIT" not in l]
        with open(p) as a, open(r) as b:
            pt, rt = a.read(), b.read()
        assert keep(pt) == keep(rt), (name, "content")
    elif name.endswith(".json"):
        with open(p) as a, open(r) as b:
            j, k = json.load(a), json.load(b)
        assert j["spectrum"] == k["spectrum"] and j["sky"] == k["sky"], name
    else:
        raise AssertionError("unexpected file " + name)
PY
}

# 1. SIGKILL at pseudo-random points (Python's random, fixed seed): even
# trials anywhere in the run, odd ones the moment a temporary of the run
# exists (plus 0-3 ms), since the writes are a small part of a run.
kill_at() {  # dir seed duration_ms command...
    "$CLEF_PYTHON" - "$@" <<'PY'
import os, random, signal, subprocess, sys, time
d, seed, dur, cmd = sys.argv[1], int(sys.argv[2]), int(sys.argv[3]), sys.argv[4:]
rnd = random.Random(seed)
p = subprocess.Popen(cmd)
t0 = time.monotonic()
if seed % 2 == 0:
    time.sleep(1.1 * dur / 1000 * rnd.random())
else:
    delay = 0.003 * rnd.random()
    while p.poll() is None and time.monotonic() - t0 < 30:
        names = [n for r, _, fs in os.walk(d) for n in fs]
        if any(".clef-tmp." in n for n in names):
            time.sleep(delay)
            break
        time.sleep(0.0003)
p.send_signal(signal.SIGKILL)
p.wait()
print("%d ms" % ((time.monotonic() - t0) * 1000))
PY
}
kill_trials() {  # name duration command
    name=$1; dur=$2; shift 2
    mkdir -p "k-$name"
    seen=0
    i=0
    while [ "$i" -lt "$trials" ]; do
        at=$(kill_at "k-$name" "$i" "$dur" "$@" "k-$name")
        n=$(temps "k-$name"); seen=$((seen + n))
        complete "k-$name" || fail "$name: SIGKILL at $at (trial $i) left an incomplete output"
        i=$((i + 1))
    done
    # The next, uninterrupted run removes the stale temporaries.
    "$@" "k-$name" || fail "$name: run after the kills failed"
    [ "$(temps "k-$name")" -eq 0 ] || fail "$name: stale temporaries left: $(find "k-$name" -name '*.clef-tmp.*')"
    complete "k-$name" || fail "$name: final run's outputs differ from the reference"
    echo "ok: $name: $trials SIGKILLs, $seen stale temporaries seen after them, all removed by the next run"
}
kill_trials spectrum "$t_spec" ./spec
kill_trials simulate "$t_simu" ./simu
# The cache the killed runs shared is valid: a run on it is a hit and agrees.
mkdir -p warm && cp -r k-spectrum/cache warm/
"$CLEF_BIN" spectrum map.fits --mask mask.fits --cache-dir warm/cache -o warm/out --verbose \
    2>warm.log || fail "run on the cache of the killed runs"
grep -q "cache: hit" warm.log || fail "the killed runs' cache gave no hit"
grep -q "ignoring\|corrupted" warm.log && fail "the killed runs left a bad cache entry: $(grep 'ignoring\|corrupted' warm.log)"
complete warm || fail "result from the killed runs' cache differs"

# 2. Stale temporaries of this host and a dead pid go; others stay.
mkdir stale
sh -c 'exit 0' & dead=$!; wait "$dead" || true
: > "stale/.out.fits.clef-tmp.$dead.$host.AbC123"
: > "stale/.clef-tmp.$dead.$host.XyZ789.gz"
: > "stale/.out.fits.clef-tmp.$$.$host.Live00"
: > "stale/.out.fits.clef-tmp.$dead.other-host.Away00"
: > "stale/.notes.tmp-keep"
spec stale || fail "run in a folder with stale temporaries"
[ -e "stale/.out.fits.clef-tmp.$dead.$host.AbC123" ] && fail "stale temporary of a dead pid kept"
[ -e "stale/.clef-tmp.$dead.$host.XyZ789.gz" ] && fail "stale gzip temporary of a dead pid kept"
[ -e "stale/.out.fits.clef-tmp.$$.$host.Live00" ] || fail "temporary of a live process removed"
[ -e "stale/.out.fits.clef-tmp.$dead.other-host.Away00" ] || fail "temporary of another host removed"
[ -e "stale/.notes.tmp-keep" ] || fail "a file that is not clef's removed"
echo "ok: stale temporaries"

# 3. SIGTERM / SIGINT while a temporary exists (the gzip scratch of a large
# map: nside 1024, so the temporary lives long enough to be seen by 10-ms
# polling on a fast, idle machine; at nside 512 it could come and go unseen).  env --default-signal undoes the SIGINT-ignore of background jobs.
for sig in TERM INT; do
    d="sig-$sig"; mkdir "$d"
    env --default-signal=INT,TERM "$CLEF_BIN" simulate --nside 1024 --cl cl.txt --lmax 400 --no-pixel-window \
        --output "$d/big.fits.gz" --quiet 2>"$d.err" & pid=$!
    n=0
    while [ "$(temps "$d")" -eq 0 ] && [ "$n" -lt 6000 ] && kill -0 "$pid" 2>/dev/null; do
        sleep 0.01; n=$((n + 1))
    done
    [ "$(temps "$d")" -gt 0 ] || fail "SIG$sig: no temporary appeared to interrupt"
    kill "-$sig" "$pid"
    rc=0; wait "$pid" 2>/dev/null || rc=$?
    want=143; [ "$sig" = INT ] && want=130
    [ "$rc" -eq "$want" ] || fail "SIG$sig: exit status $rc, expected $want"
    grep -q "interrupted by a signal; temporary files removed" "$d.err" || fail "SIG$sig: no message"
    [ -z "$(ls -A "$d")" ] || fail "SIG$sig left files: $(ls -A "$d")"
    echo "ok: SIG$sig: status $rc, nothing left"
done

# 4. Disk full, read-only folder, folder deleted during the run.
expect_io() {  # what dir logfile
    rc=$1; shift
    what=$1; d=$2; log=$3
    [ "$rc" -eq 4 ] || fail "$what: exit $rc, expected 4 ($(cat "$log"))"
    left=$(ls -A "$d" 2>/dev/null | grep -v '^cache$' || true)
    [ -z "$left" ] || fail "$what: left files: $left"
}
if [ "$(id -u)" -eq 0 ] && unshare -m true 2>/dev/null; then
    mkdir full
    rc=0
    unshare -m sh -c 'mount -t tmpfs -o size=200k tmpfs full && "$0" simulate --nside 64 \
        --cl cl.txt --output full/sky.fits --quiet 2>full.log; rc=$?; ls -A full > full.ls; exit $rc' \
        "$CLEF_BIN" || rc=$?
    [ "$rc" -eq 4 ] || fail "disk full (simulate): exit $rc ($(cat full.log))"
    grep -q "cannot write 'full/sky.fits': no space left on device" full.log ||
        fail "disk full (simulate): message: $(cat full.log)"
    [ -s full.ls ] && fail "disk full (simulate): left $(cat full.ls)"
    rc=0
    unshare -m sh -c 'mount -t tmpfs -o size=16k tmpfs full && "$0" spectrum map.fits \
        --mask mask.fits --no-cache -o full/out --quiet 2>full2.log; rc=$?; ls -A full > full.ls;
        exit $rc' "$CLEF_BIN" || rc=$?
    [ "$rc" -eq 4 ] || fail "disk full (spectrum): exit $rc ($(cat full2.log))"
    grep -q "no space left on device" full2.log || fail "disk full (spectrum): message: $(cat full2.log)"
    grep -q "clef-tmp" full2.log && fail "disk full (spectrum): the message names the temporary"
    [ -s full.ls ] && fail "disk full (spectrum): left $(cat full.ls)"
    echo "ok: disk full: $(cat full.log)"
    mkdir ro
    rc=0
    unshare -m sh -c 'mount --bind ro ro && mount -o remount,bind,ro ro && "$0" spectrum \
        map.fits --mask mask.fits --no-cache -o ro/out --quiet 2>ro.log' "$CLEF_BIN" || rc=$?
    expect_io "$rc" "read-only folder" ro ro.log
    grep -q "ro/out.*[Rr]ead-only file system" ro.log || fail "read-only folder: message: $(cat ro.log)"
    echo "ok: read-only folder: $(cat ro.log)"
else
    echo "skipped: disk full and read-only mount need root and unshare -m (running as $(id -un))"
    mkdir ro && chmod 555 ro
    rc=0; "$CLEF_BIN" spectrum map.fits --mask mask.fits --no-cache -o ro/out --quiet 2>ro.log || rc=$?
    expect_io "$rc" "read-only folder (mode 555)" ro ro.log
    grep -q "ro/out" ro.log || fail "read-only folder: message: $(cat ro.log)"
    chmod 755 ro
fi
# wait_read PID BYTES: until the process has read BYTES (/proc/PID/io rchar),
# i.e. its inputs, and is computing.
wait_read() {
    n=0
    while [ "$n" -lt 2000 ] && kill -0 "$1" 2>/dev/null; do
        r=$(sed -n 's/^rchar: //p' "/proc/$1/io" 2>/dev/null || echo 0)
        [ "${r:-0}" -ge "$2" ] && return 0
        sleep 0.005; n=$((n + 1))
    done
}
size=$(($(wc -c < map.fits) + $(wc -c < mask.fits)))
mkdir -p gone/sub
"$CLEF_BIN" spectrum map.fits --mask mask.fits --no-cache -o gone/sub/out --quiet 2>gone.log & pid=$!
wait_read "$pid" "$size"
rm -rf gone/sub
rc=0; wait "$pid" || rc=$?
[ "$rc" -eq 4 ] || fail "folder deleted during the run: exit $rc ($(cat gone.log))"
grep -q "gone/sub/out" gone.log || fail "folder deleted: message does not name the target: $(cat gone.log)"
[ -e gone/sub ] && fail "folder deleted: clef recreated it: $(ls -A gone/sub)"
echo "ok: output folder deleted: $(cat gone.log)"

# 5. Input truncated or replaced while the job runs: once clef has read the
# map and the mask (/proc/PID/io rchar), change the map.
for how in truncate replace; do
    d="in-$how"; mkdir "$d"; cp map.fits "$d/map.fits"
    [ "$how" = replace ] && "$CLEF_BIN" simulate --nside 128 --cl cl.txt --seed 9 \
        --output "$d/new.fits" --quiet
    "$CLEF_BIN" spectrum "$d/map.fits" --mask mask.fits --no-cache -o "$d/out" --quiet \
        2>"$d.log" & pid=$!
    wait_read "$pid" "$size"
    if [ "$how" = truncate ]; then
        truncate -s 20000 "$d/map.fits"
    else
        mv "$d/new.fits" "$d/map.fits"
    fi
    rc=0; wait "$pid" || rc=$?
    case "$rc" in
    4) grep -q "input '$d/map.fits' changed while clef was running" "$d.log" ||
           fail "input $how: message: $(cat "$d.log")" ;;
    5) [ "$how" = truncate ] || fail "input $how: exit 5 ($(cat "$d.log"))" ;;
    *) fail "input $how: exit $rc, expected 4 ($(cat "$d.log"))" ;;
    esac
    ls "$d" | grep -q '^out' && fail "input $how: outputs written: $(ls "$d")"
    echo "ok: input $how while running: exit $rc: $(cat "$d.log")"
done

# 6. Memory limits (ulimit -v): a partial-sky map of NSIDE 8192 (3 pixels,
# written by astropy) needs the full 7.2 GB sky: exit 8 with the size; the
# same NSIDE in a header over a 12-row table: exit 5 before any allocation.
# AddressSanitizer reserves more address space than any such limit: skipped.
if [ -z "${CLEF_SANITIZE:-}" ]; then
    "$CLEF_PYTHON" - <<'PY'
import numpy as np
from astropy.io import fits
def write(name, cols, **kw):
    h = fits.BinTableHDU.from_columns(cols)
    for k, v in kw.items():
        h.header[k] = v
    fits.HDUList([fits.PrimaryHDU(), h]).writeto(name, overwrite=True)
write("big-partial.fits", [fits.Column(name="PIXEL", format="K", array=np.arange(3)),
                           fits.Column(name="T", format="D", array=np.ones(3))],
      PIXTYPE="HEALPIX", ORDERING="RING", NSIDE=8192, INDXSCHM="EXPLICIT")
write("big-tiny.fits", [fits.Column(name="T", format="D", array=np.ones(12))],
      PIXTYPE="HEALPIX", ORDERING="RING", NSIDE=8192)
PY
    rc=0; (ulimit -v 1048576; "$CLEF_BIN" inspect big-partial.fits) 2>mem.log >/dev/null || rc=$?
    [ "$rc" -eq 8 ] || fail "ulimit -v, NSIDE 8192 partial map: exit $rc, expected 8 ($(cat mem.log))"
    grep -q "nside 8192 (805306368 pixels, 7.25 GB)" mem.log || fail "ulimit -v: message: $(cat mem.log)"
    rc=0; (ulimit -v 1048576; "$CLEF_BIN" inspect big-tiny.fits) 2>mem2.log >/dev/null || rc=$?
    [ "$rc" -eq 5 ] || fail "ulimit -v, NSIDE 8192 over 12 rows: exit $rc, expected 5 ($(cat mem2.log))"
    echo "ok: ulimit -v 1 GiB: $(cat mem.log); $(cat mem2.log)"
else
    echo "skipped: ulimit -v checks under the sanitizer build"
fi

[ "$failures" -eq 0 ] || { echo "$failures fault check(s) failed"; exit 1; }
echo "all fault checks passed"

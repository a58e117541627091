#!/bin/sh
# clef spectrum end to end: outputs read back by outside readers (Python's
# json, astropy), fitsverify on the FITS table, agreement of FITS, CSV and
# JSON, the coupling cache on a second run, and the documented exit codes
# for bad input with nothing written (docs/exit-codes.md).
set -u
T="$CLEF_TEST_TMP/spectrum-cli"
mkdir -p "$T" || exit 1
fail() { echo "FAIL: $*"; exit 1; }
C="$CLEF_BIN"

# A small sky: two noise splits at nside 64 with a 30-arcmin beam, and a
# latitude-cut mask.
"$C" simulate --quiet --nside 64 --model --seed 3 --beam-fwhm 30 --noise-depth 30 --splits 2 \
    --coordsys G --output "$T/sky.fits" || fail "simulate"
"$C" mask --quiet --nside 64 --latitude-cut 15 --taper c2 --taper-width 5 --coordsys G \
    --output "$T/mask.fits" || fail "mask"
"$C" mask --quiet --nside 32 --output "$T/mask32.fits" || fail "mask32"
"$C" mask --quiet --nside 64 --patch 0,90,0.1 --output "$T/empty.fits" || fail "empty mask"
"$C" mask --quiet --nside 64 --patch 0,90,4 --output "$T/tiny.fits" || fail "tiny mask"

"$C" spectrum "$T/sky_split1.fits" "$T/sky_split2.fits" --mask "$T/mask.fits" --beam-fwhm 30 \
    --output "$T/run" > "$T/out.txt" 2> "$T/err.txt" || fail "spectrum exit $?: $(cat "$T/err.txt")"
for f in run.fits run.csv run-cov.csv run-windows.csv run.json; do
    [ -s "$T/$f" ] || fail "missing output $f"
done
grep -q "first peak" "$T/out.txt" || fail "no peak line: $(cat "$T/out.txt")"
fitsverify -q "$T/run.fits" | grep -q "verification OK" || fail "fitsverify: $(fitsverify "$T/run.fits")"

# FITS (astropy), CSV (numpy) and JSON (json) say the same thing.
"$CLEF_PYTHON" - "$T" <<'PY' || fail "outputs disagree"
import json, sys
import numpy as np
from astropy.io import fits
t = sys.argv[1]
j = json.load(open(t + "/run.json"))
assert j["program"] == "clef" and j["spectrum"] == "cross", j["spectrum"]
assert len(j["inputs"]) == 3 and all(len(i["sha256"]) == 64 for i in j["inputs"])
import hashlib
assert j["inputs"][0]["sha256"] == hashlib.sha256(open(t + "/sky_split1.fits", "rb").read()).hexdigest()
assert 0.6 < j["sky"]["f_sky"] < 0.8, j["sky"]
assert j["options"]["lmax"] <= 191 and j["options"]["beam_fwhm_arcmin"] == 30
assert "total" in j["timings_s"] and "coupling" in j["timings_s"]
with fits.open(t + "/run.fits") as h:
    b = h["BANDPOWER"]
    d = b.data["D_BAND"]; e = b.data["D_SIGMA"]
    assert b.columns["D_BAND"].unit == "uK^2"
    assert b.header["NSIDE"] == 64 and b.header["SPECTYPE"] == "cross"
    cov = h["BANDCOV"].data
    assert cov.shape == (len(d), len(d))
    assert np.allclose(np.sqrt(np.diag(cov)), e, rtol=1e-12)
    assert np.allclose(cov, cov.T)
assert np.allclose(d, j["bandpowers"]["d_uK2"], rtol=1e-12)
import csv
rows = list(csv.DictReader(l for l in open(t + "/run.csv") if not l.startswith("#")))
assert np.allclose([float(r["d_band_uK2"]) for r in rows], d, rtol=1e-12)
assert np.allclose(np.loadtxt(t + "/run-cov.csv", delimiter=","), cov, rtol=1e-12)
assert "peak" in j and "found" in j["peak"]
# Band-power windows (docs/formats-spectrum.md): FITS HDU BANDWIN = the CSV
# side file; each row sums to 1 over its own bin's multipoles.
with fits.open(t + "/run.fits") as h:
    w = h["BANDWIN"].data
    lo, hi = h["BANDPOWER"].data["LMIN"], h["BANDPOWER"].data["LMAX"]
assert w.shape == (len(d), j["bandpowers"]["windows"]["l_max"] + 1), w.shape
assert np.allclose(np.loadtxt(t + "/run-windows.csv", delimiter=","), w, rtol=1e-15, atol=0)
for b in range(len(d)):
    assert abs(w[b, lo[b]:hi[b] + 1].sum() - 1) < 1e-9, (b, w[b, lo[b]:hi[b] + 1].sum())
assert np.allclose(w.sum(axis=1), j["bandpowers"]["windows"]["row_sums"], rtol=1e-12)
PY

# Second run: the coupling comes from the cache.
"$C" spectrum "$T/sky_split1.fits" "$T/sky_split2.fits" --mask "$T/mask.fits" --beam-fwhm 30 \
    --format json --output "$T/again" > /dev/null 2>&1 || fail "second run"
"$CLEF_PYTHON" -c "import json,sys; j=json.load(open(sys.argv[1])); sys.exit(0 if j['coupling']['cache_hit'] else 1)" \
    "$T/again.json" || fail "second run did not use the coupling cache"
[ ! -e "$T/again.fits" ] || fail "--format json wrote a FITS file"

# The transform's ring weights went to the cache folder too (issue 17): one
# entry of 2 nside = 128 doubles after the 184-byte header (docs/coupling.md);
# a corrupted entry is reported, recomputed and rewritten, with the same
# band powers (Python's json compares them).
rw=$(ls "$CLEF_CACHE_DIR"/ring-weights-*.bin 2>/dev/null)
[ "$(echo "$rw" | wc -w)" -eq 1 ] || fail "expected one ring-weight cache entry, found: $rw"
[ "$(wc -c < "$rw")" -eq $((184 + 128 * 8)) ] || fail "ring-weight entry size $(wc -c < "$rw")"
printf '\377' | dd of="$rw" bs=1 seek=300 conv=notrunc 2>/dev/null
"$C" spectrum "$T/sky_split1.fits" "$T/sky_split2.fits" --mask "$T/mask.fits" --beam-fwhm 30 \
    --format json --output "$T/rewt" > /dev/null 2> "$T/rewt.err" || fail "run with a corrupted ring-weight entry"
grep -q "ring-weights-.*corrupted" "$T/rewt.err" || fail "no warning for the corrupted entry: $(cat "$T/rewt.err")"
"$CLEF_PYTHON" - "$T/again.json" "$T/rewt.json" <<'PY' || fail "band powers changed with recomputed ring weights"
import json, sys
a, b = (json.load(open(f))["bandpowers"]["d_uK2"] for f in sys.argv[1:3])
assert a == b, (a, b)
PY
"$C" spectrum "$T/sky_split1.fits" "$T/sky_split2.fits" --mask "$T/mask.fits" --beam-fwhm 30 \
    --format json --output "$T/rewt2" > /dev/null 2> "$T/rewt2.err" || fail "run after the rewrite"
! grep -q "ring-weights" "$T/rewt2.err" || fail "rewritten entry not used: $(cat "$T/rewt2.err")"

# A beam table that stops below 2 nside caps the default lmax and the coupled
# range, with a warning naming it (Gaussian beam B_l = exp(-l(l+1) sigma^2/2),
# sigma = FWHM/sqrt(8 ln 2): METHODS.md 6).
"$CLEF_PYTHON" -c "
import numpy as np
l = np.arange(101); s = 30 / 60 * np.pi / 180 / np.sqrt(8 * np.log(2))
np.savetxt('$T/beam.txt', np.c_[l, np.exp(-l * (l + 1) * s * s / 2)], fmt='%d %.12g', header='l B_l')
" || fail "beam table"
"$C" spectrum "$T/sky_split1.fits" --mask "$T/mask.fits" --beam-table "$T/beam.txt" --format json \
    --output "$T/btab" > /dev/null 2> "$T/btab.err" || fail "spectrum with a beam table"
"$CLEF_PYTHON" -c "
import json, sys
j = json.load(open(sys.argv[1])); o = j['options']
ok = o['lmax'] <= 100 and o['lmax_coupled'] == 100 and any('beam table stops at l = 100' in w for w in j['warnings'])
sys.exit(0 if ok else 1)" "$T/btab.json" || fail "lmax not capped by the beam table: $(cat "$T/btab.json")"
# ... and the cap is not silent: its reason, with the file, is in stderr and
# in the JSON warnings.
grep -q "lmax capped at 100: the beam table" "$T/btab.err" || fail "no cap warning: $(cat "$T/btab.err")"
"$CLEF_PYTHON" -c "import json,sys; j=json.load(open(sys.argv[1])); sys.exit(0 if any('lmax capped at 100' in w and 'beam.txt' in w for w in j['warnings']) else 1)" \
    "$T/btab.json" || fail "cap warning missing from the JSON warnings"
"$C" spectrum "$T/sky_split1.fits" --mask "$T/mask.fits" --beam-file "$T/beam.txt" -o "$T/bad" \
    > /dev/null 2>&1 && fail "the old option name --beam-file is still accepted"

# Default lmax: at most 2 nside, whole bins, hidden bins above it; a given
# lmax above 2 nside is warned about on stderr and in the JSON.
"$CLEF_PYTHON" -c "
import json, sys
j = json.load(open(sys.argv[1])); o = j['options']; b = j['bandpowers']
w = [h - l + 1 for l, h in zip(b['l_min'], b['l_max'])]
ok = o['lmax'] <= 128 and o['lmax_coupled'] == 191 and o['hidden_bins'] >= 1 and len(set(w)) == 1
sys.exit(0 if ok else 1)" "$T/run.json" || fail "default lmax and bins: $(cat "$T/run.json")"
"$C" spectrum "$T/sky_split1.fits" --mask "$T/mask.fits" --beam-fwhm 30 --lmax 160 --format json \
    --output "$T/high" > /dev/null 2> "$T/high.err" || fail "spectrum --lmax 160"
grep -q "warning: lmax = 160 is above 2\*nside = 128" "$T/high.err" || fail "no lmax warning: $(cat "$T/high.err")"
"$CLEF_PYTHON" -c "import json,sys; j=json.load(open(sys.argv[1])); sys.exit(0 if any('above 2*nside' in w for w in j['warnings']) else 1)" \
    "$T/high.json" || fail "lmax warning not in the JSON"

# Bad input: the documented exit code, a message, and no output.
expect() { # code, description, command...
    code=$1; what=$2; shift 2
    rm -f "$T"/bad*
    "$@" > "$T/o.txt" 2> "$T/e.txt"
    rc=$?
    [ "$rc" -eq "$code" ] || fail "$what: exit $rc, expected $code ($(cat "$T/e.txt"))"
    [ -s "$T/e.txt" ] || [ "$code" -eq 0 ] || fail "$what: no message"
    ls "$T"/bad* > /dev/null 2>&1 && fail "$what: wrote $(ls "$T"/bad*)"
    return 0
}
S1="$T/sky_split1.fits"
expect 3 "lmax above 3 nside - 1" "$C" spectrum "$S1" --mask "$T/mask.fits" --lmax 192 -o "$T/bad"
grep -q "3\*nside-1" "$T/e.txt" || fail "lmax message: $(cat "$T/e.txt")"
expect 3 "map and mask of different nside" "$C" spectrum "$S1" --mask "$T/mask32.fits" -o "$T/bad"
grep -q "nside" "$T/e.txt" || fail "nside message: $(cat "$T/e.txt")"
expect 3 "mask with no sky" "$C" spectrum "$S1" --mask "$T/empty.fits" -o "$T/bad"
expect 6 "bins leaving the coupling singular" "$C" spectrum "$S1" --mask "$T/tiny.fits" \
    --bin-width 1 --lmax 191 --keep-multipoles -o "$T/bad"
grep -q "bin" "$T/e.txt" || fail "singular message: $(cat "$T/e.txt")"
expect 2 "no mask" "$C" spectrum "$S1" -o "$T/bad"
expect 2 "three maps" "$C" spectrum "$S1" "$S1" "$S1" --mask "$T/mask.fits" -o "$T/bad"
expect 2 "unknown format" "$C" spectrum "$S1" --mask "$T/mask.fits" --format xml -o "$T/bad"
expect 4 "missing map" "$C" spectrum "$T/none.fits" --mask "$T/mask.fits" -o "$T/bad"
printf 'not a fits file\n' > "$T/text.fits"
expect 5 "text file as map" "$C" spectrum "$T/text.fits" --mask "$T/mask.fits" -o "$T/bad"
expect 4 "output folder missing" "$C" spectrum "$S1" --mask "$T/mask.fits" -o "$T/no/dir/bad"
"$C" spectrum --help | grep -q -- "--beam-fwhm" || fail "--help"
exit 0

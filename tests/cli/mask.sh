#!/bin/sh
# clef mask end to end: astropy writes the input map and reads clef's mask
# back; numpy recomputes the threshold mask and the moments printed by
# --report --json (parsed by Python's json).  Bad inputs give the documented
# exit codes (clef mask --help, src/cli/cli.h) and leave no output file.
set -eu
: "${CLEF_BIN:?}" "${CLEF_PYTHON:?}" "${CLEF_TEST_TMP:?}"
T=$(mktemp -d "$CLEF_TEST_TMP/mask-XXXXXX")
cd "$T"
failures=0
fail() { echo "FAIL: $*"; failures=$((failures + 1)); }

# A RING map of nside 32 with a few bad pixels, in galactic coordinates.
"$CLEF_PYTHON" - <<'EOF'
import numpy as np
from astropy.io import fits
nside = 32
npix = 12 * nside * nside
rng = np.random.default_rng(4)
v = rng.uniform(-1.0, 1.0, npix)
v[rng.choice(npix, 40, replace=False)] = -1.6375e30
col = fits.Column(name="HITS", format="1024D", array=v.reshape(-1, 1024))
h = fits.BinTableHDU.from_columns([col])
for k, x in [("PIXTYPE", "HEALPIX"), ("ORDERING", "RING"), ("NSIDE", nside),
             ("FIRSTPIX", 0), ("LASTPIX", npix - 1), ("INDXSCHM", "IMPLICIT"),
             ("OBJECT", "FULLSKY"), ("COORDSYS", "G"), ("BAD_DATA", -1.6375e30)]:
    h.header[k] = x
fits.HDUList([fits.PrimaryHDU(), h]).writeto("hits.fits")
np.save("hits.npy", v)
EOF

# 1. Threshold mask from a map: value >= 0.3 and valid.
if "$CLEF_BIN" mask --from hits.fits --threshold 0.3 --output thr.fits --json thr.json --quiet; then
    "$CLEF_PYTHON" - <<'EOF' || fail "threshold mask differs from numpy"
import json
import numpy as np
from astropy.io import fits
v = np.load("hits.npy")
want = ((v >= 0.3) & (v > -1e30)).astype(float)
with fits.open("thr.fits") as f:
    got = np.asarray(f[1].data["MASK"], dtype=float).ravel()
    assert f[1].header["COORDSYS"] == "G", "COORDSYS not kept"
assert got.shape == want.shape
assert np.array_equal(got, want), "mask pixels differ"
r = json.load(open("thr.json"))
assert r["nside"] == 32 and r["npix"] == 12288
assert abs(r["f_sky"] - want.mean()) < 1e-12, (r["f_sky"], want.mean())
for k in ("w1", "w2", "w4", "f_sky_eff"):
    assert abs(r[k] - want.mean()) < 1e-12, k
assert r["taper"] == "none" and r["taper_width_deg"] is None
assert r["program"] == "clef" and r["observed_pixels"] == int(want.sum()) and r["warnings"] == []
EOF
else
    fail "clef mask --from hits.fits --threshold 0.3"
fi

# 2. Generated, cut, holed and apodized mask; moments against numpy.
printf '# lon lat radius[arcmin]\n10 45 300\n200 -60 240  # second\n\n' > holes.txt
for kind in c1 c2 gauss; do
    if "$CLEF_BIN" mask --nside 64 --coordsys G --latitude-cut 25 --holes holes.txt \
        --taper $kind --taper-width 4 --output ap_$kind.fits --report --json ap_$kind.json > ap_$kind.txt; then
        KIND=$kind "$CLEF_PYTHON" - <<'EOF' || fail "apodized mask ($kind) checks"
import json, os
import numpy as np
from astropy.io import fits
k = os.environ["KIND"]
with fits.open("ap_%s.fits" % k) as f:
    w = np.asarray(f[1].data["MASK"], dtype=float).ravel()
    assert f[1].header["NSIDE"] == 64 and f[1].header["ORDERING"] == "RING"
assert w.size == 12 * 64 * 64
assert w.min() >= 0.0 and w.max() <= 1.0, (w.min(), w.max())
assert (w > 0).mean() <= 1 - np.sin(np.radians(25)) + 2 / (3 * 64)
assert ((w > 0) & (w < 1)).sum() > 100, "no apodized transition"
r = json.load(open("ap_%s.json" % k))
for key, ref in (("w1", w.mean()), ("w2", (w**2).mean()), ("w4", (w**4).mean()),
                 ("f_sky", (w > 0).mean())):
    assert abs(r[key] - ref) <= 1e-12 * max(1.0, ref), (key, r[key], ref)
assert abs(r["f_sky_eff"] - (w**2).mean()**2 / (w**4).mean()) < 1e-12
assert r["taper"] == k and r["taper_width_deg"] == 4
EOF
    else
        fail "clef mask --taper $kind"
    fi
done

# 3. A deep-field patch: f_sky near the cap area (1 - cos 15 deg) / 2.
"$CLEF_BIN" mask --nside 128 --patch 30,-50,15 --report > patch.txt || fail "patch"
"$CLEF_PYTHON" -c "
import math
d = dict(l.split(None, 1) for l in open('patch.txt'))
f = float(d['f_sky'])
assert abs(f - (1 - math.cos(math.radians(15))) / 2) < 0.02 * f, f
" || fail "patch sky fraction"

# 4. Masks that clef spectrum cannot use are written with a warning that
# says why, on stderr and in the JSON warnings.
"$CLEF_BIN" mask --nside 64 --patch 0,90,0.1 --output zero.fits --json zero.json 2> zero.err \
    || fail "all-zero mask exit $?"
grep -q "no observed pixel" zero.err || fail "no warning for an all-zero mask: $(cat zero.err)"
"$CLEF_BIN" mask --nside 64 --patch 0,90,1.5 --output small.fits --json small.json 2> small.err \
    || fail "tiny mask exit $?"
grep -q "too small for any band-power bin" small.err || fail "no warning for a tiny mask: $(cat small.err)"
"$CLEF_PYTHON" - <<'EOF' || fail "mask warnings in the JSON"
import json
z = json.load(open("zero.json")); s = json.load(open("small.json"))
assert z["observed_pixels"] == 0 and any("no observed pixel" in w for w in z["warnings"]), z
assert any("too small" in w and "coupling" in w for w in s["warnings"]), s
# The warning tells the truth: the coupling width exceeds l = 2..3 nside - 1.
assert s["coupling_width"] > 3 * 64 - 3, s["coupling_width"]
EOF
"$CLEF_BIN" mask --nside 64 --latitude-cut 20 --output fine.fits 2> fine.err || fail "cut mask"
[ ! -s fine.err ] || fail "a usable mask got a warning: $(cat fine.err)"

# 5. Bad inputs: exit code and no output file.
expect() {
    want=$1; shift
    rm -f out.fits
    set +e
    "$CLEF_BIN" mask "$@" > /dev/null 2> err.txt
    rc=$?
    set -e
    [ "$rc" -eq "$want" ] || fail "clef mask $* exited $rc, expected $want ($(cat err.txt))"
    [ ! -e out.fits ] || fail "clef mask $* left out.fits"
    if ls -A | grep -q '\.clef-tmp\.'; then fail "clef mask $* left a temporary file"; fi
    return 0
}
printf '1 2 3\n4 5\n' > badholes.txt
echo "not a fits file" > text.fits
expect 2
expect 2 --nside 8
expect 2 --nside 8 --from hits.fits --output out.fits
expect 2 --nside 8 --taper c3 --taper-width 1 --output out.fits
expect 2 --nside 8 --taper c1 --output out.fits
# The former option names are gone, not aliases.
expect 2 --nside 8 --apodize c1 --apod-scale 1 --output out.fits
expect 2 --nside 8 --taper c1 --apod-scale 1 --output out.fits
expect 2 --nside 8 --patch 1,2 --output out.fits
expect 2 --nside 8 --latitude-cut ten --output out.fits
expect 2 --nside 8 --erode 1 --output out.fits
expect 2 --nside 8 --coordsys X --output out.fits
expect 3 --nside 12 --output out.fits
expect 3 --nside 8 --latitude-cut 95 --output out.fits
expect 3 --nside 8 --patch 0,100,5 --output out.fits
expect 3 --nside 8 --taper c2 --taper-width 0 --output out.fits
expect 3 --from hits.fits --coordsys C --output out.fits
expect 4 --nside 8 --holes missing.txt --output out.fits
expect 5 --nside 8 --holes badholes.txt --output out.fits
grep -q "badholes.txt line 2" err.txt || fail "holes error should name file and line: $(cat err.txt)"
expect 4 --from missing.fits --output out.fits
rm -f out.fits
set +e
"$CLEF_BIN" mask --from text.fits --output out.fits 2> err.txt
rc=$?
set -e
[ "$rc" -eq 4 ] || [ "$rc" -eq 5 ] || fail "text file as map exited $rc"
[ ! -e out.fits ] || fail "text file as map left out.fits"
set +e
"$CLEF_BIN" mask --nside 8 --output nodir/out.fits 2> err.txt
rc=$?
set -e
[ "$rc" -eq 4 ] || fail "unwritable output exited $rc, expected 4"

# 6. --help documents every option.
"$CLEF_BIN" mask --help > help.txt || fail "--help"
for o in --nside --from --column --hdu --threshold --latitude-cut --holes --patch --coordsys \
    --taper --taper-width --erode --ordering --output --float32 --report --json --threads --quiet \
    --verbose --help; do
    grep -q -- "$o" help.txt || fail "--help does not mention $o"
done

[ "$failures" -eq 0 ]

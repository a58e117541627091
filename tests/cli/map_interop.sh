#!/bin/sh
# Map I/O against an independent FITS implementation: astropy.io.fits writes
# maps that clef reads, clef writes maps that astropy.io.fits reads back, and
# numpy computes the reference statistics.  fitsverify checks clef's output.
# Every bad input of the map reader gives its documented exit code
# (src/cli/cli.h, docs/exit-codes.md) and writes nothing.
set -eu
: "${CLEF_BIN:?}" "${CLEF_PYTHON:?}" "${CLEF_TEST_TMP:?}"
T=$(mktemp -d "$CLEF_TEST_TMP/interop-XXXXXX")
cd "$T"
failures=0
fail() { echo "FAIL: $*"; failures=$((failures + 1)); }

# ---------------------------------------------------------------------------
# 1. A NESTED, gzipped, float32 map written by astropy (1024 values per row,
#    COORDSYS, TUNIT, a few BAD_DATA and NaN pixels); numpy gives the figures.
# ---------------------------------------------------------------------------
"$CLEF_PYTHON" - <<'EOF'
import json
import numpy as np
from astropy.io import fits

nside = 64
npix = 12 * nside * nside
rng = np.random.default_rng(20261201)
v = (25.0 + 80.0 * rng.standard_normal(npix)).astype(np.float32)
v[rng.choice(npix, 300, replace=False)] = -1.6375e30
v[rng.choice(npix, 50, replace=False)] = np.nan
col = fits.Column(name="I_STOKES", format="1024E", unit="uK_CMB", array=v.reshape(-1, 1024))
h = fits.BinTableHDU.from_columns([col], name="XTENSION_MAP")
for k, val in [("PIXTYPE", "HEALPIX"), ("ORDERING", "NESTED"), ("NSIDE", nside),
               ("FIRSTPIX", 0), ("LASTPIX", npix - 1), ("INDXSCHM", "IMPLICIT"),
               ("OBJECT", "FULLSKY"), ("COORDSYS", "G"), ("BAD_DATA", -1.6375e30)]:
    h.header[k] = val
fits.HDUList([fits.PrimaryHDU(), h]).writeto("nested_f32.fits.gz", overwrite=True)

# Reference figures: numpy on the float32 values promoted to float64.
bad = np.isnan(v) | (np.abs(v.astype(np.float64) + 1.6375e30) <= 1e-5 * 1.6375e30)
g = v[~bad].astype(np.float64)
ref = {"valid": int(g.size), "bad": int(bad.sum()), "mean": float(g.mean()),
       "rms": float(np.sqrt(np.mean(g * g))), "stddev": float(g.std()),
       "min": float(g.min()), "max": float(g.max())}
json.dump(ref, open("numpy_ref.json", "w"))

# A RING explicit-index partial map (PIXEL + value, int32 indices), float64.
pix = np.sort(rng.choice(768, 200, replace=False)).astype(np.int32)
val = rng.standard_normal(200)
h = fits.BinTableHDU.from_columns([fits.Column(name="PIXEL", format="J", array=pix),
                                   fits.Column(name="SIGNAL", format="D", array=val)])
for k, x in [("PIXTYPE", "HEALPIX"), ("ORDERING", "RING"), ("NSIDE", 8),
             ("INDXSCHM", "EXPLICIT"), ("OBJECT", "PARTIAL"), ("COORDSYS", "C")]:
    h.header[k] = x
fits.HDUList([fits.PrimaryHDU(), h]).writeto("partial_ring.fits", overwrite=True)
np.save("partial_pix.npy", pix)
np.save("partial_val.npy", val)
EOF

"$CLEF_BIN" inspect --json inspect.json nested_f32.fits.gz > inspect-quiet.txt || fail "inspect of the astropy map"
"$CLEF_BIN" inspect nested_f32.fits.gz > inspect.txt || fail "inspect (text) of the astropy map"
"$CLEF_PYTHON" - <<'EOF' || fail "inspect figures differ from numpy's"
import json, sys
got = json.load(open("inspect.json"))
ref = json.load(open("numpy_ref.json"))
errs = []
def same(key, a, b):
    if a != b:
        errs.append(f"{key}: clef {a!r}, expected {b!r}")
def close(key, a, b, rtol):
    if abs(a - b) > rtol * abs(b):
        errs.append(f"{key}: clef {a!r}, numpy {b!r}")
same("nside", got["nside"], 64)
same("npix", got["npix"], 49152)
same("ordering", got["ordering"], "NESTED")
same("program", got["program"], "clef")
same("path", got["path"], "nested_f32.fits.gz")
same("coordsys", got["coordsys"], "G")
same("unit", got["unit"], "uK_CMB")
same("column", got["column"], "I_STOKES")
same("valid_pixels", got["valid_pixels"], ref["valid"])
same("bad_pixels", got["bad_pixels"], ref["bad"])
same("missing_pixels", got["missing_pixels"], ref["bad"])
close("f_sky", got["f_sky"], ref["valid"] / 49152, 1e-15)
same("min", got["min"], ref["min"])     # float32 values are exact in float64
same("max", got["max"], ref["max"])
close("mean", got["mean"], ref["mean"], 1e-12)    # numpy (pairwise sum) as reference
close("rms", got["rms"], ref["rms"], 1e-12)
close("stddev", got["stddev"], ref["stddev"], 1e-12)
if errs:
    print("\n".join(errs))
    sys.exit(1)
EOF
grep -q "NESTED in the file" inspect.txt || fail "text summary lacks the file ordering"

# ---------------------------------------------------------------------------
# 2. Maps written by clef, read back by astropy.io.fits; fitsverify on them.
# ---------------------------------------------------------------------------
"$CLEF_BIN" convert --float32 nested_f32.fits.gz ring_f32.fits || fail "convert nested"
"$CLEF_BIN" convert --row-length 1 partial_ring.fits full_f64.fits || fail "convert partial"
"$CLEF_BIN" convert partial_ring.fits full_f64.fits.gz || fail "convert to gzip"
"$CLEF_PYTHON" - <<'EOF' || fail "astropy disagrees with clef's output"
import sys
import numpy as np
from astropy.io import fits
errs = []
# Partial RING map -> full-sky table: listed pixels keep their values, the
# others hold BAD_DATA.
with open("full_f64.fits.gz", "rb") as z:
    if z.read(2) != b"\x1f\x8b":
        errs.append("full_f64.fits.gz is not gzip")
with fits.open("full_f64.fits.gz") as z, fits.open("full_f64.fits") as f:
    if not np.array_equal(np.asarray(z[1].data["SIGNAL"]).ravel(),
                          np.asarray(f[1].data["SIGNAL"]).ravel()):
        errs.append("gzip output differs from plain output")
with fits.open("full_f64.fits") as f:
    h = f[1].header
    for k, x in [("PIXTYPE", "HEALPIX"), ("ORDERING", "RING"), ("NSIDE", 8), ("FIRSTPIX", 0),
                 ("LASTPIX", 767), ("INDXSCHM", "IMPLICIT"), ("OBJECT", "FULLSKY"),
                 ("COORDSYS", "C"), ("BAD_DATA", -1.6375e30), ("TTYPE1", "SIGNAL"),
                 ("TFORM1", "1D")]:
        if h.get(k) != x:
            errs.append(f"full_f64.fits {k} = {h.get(k)!r}, expected {x!r}")
    if "CLEFVERS" not in h:
        errs.append("no CLEFVERS keyword")
    d = np.asarray(f[1].data["SIGNAL"], dtype=np.float64).ravel()
    pix = np.load("partial_pix.npy")
    val = np.load("partial_val.npy")
    if d.size != 768 or not np.array_equal(d[pix], val):
        errs.append("listed pixels differ")
    rest = np.setdiff1d(np.arange(768), pix)
    if not np.all(d[rest] == -1.6375e30):
        errs.append("unlisted pixels are not BAD_DATA")
# NESTED float32 map -> RING float32: same multiset of values (the pixel
# renumbering itself is checked against chealpix in test_map), bad pixels
# carried as BAD_DATA.
with fits.open("ring_f32.fits") as f, fits.open("nested_f32.fits.gz") as g:
    h = f[1].header
    if h["ORDERING"] != "RING" or h["TFORM1"] != "1024E" or h["TUNIT1"] != "uK_CMB":
        errs.append(f"ring_f32.fits header: {h['ORDERING']} {h['TFORM1']} {h.get('TUNIT1')}")
    a = np.asarray(f[1].data["I_STOKES"]).ravel().astype(np.float64)
    b = np.asarray(g[1].data["I_STOKES"]).ravel().astype(np.float64)
    b[np.isnan(b)] = -1.6375e30
    if not np.array_equal(np.sort(a), np.sort(b.astype(np.float32).astype(np.float64))):
        errs.append("ring_f32.fits values are not a permutation of the input's")
if errs:
    print("\n".join(errs))
    sys.exit(1)
EOF
for f in ring_f32.fits full_f64.fits full_f64.fits.gz; do
    fitsverify "$f" > "$f.verify" 2>&1 || true
    grep -q "Verification found 0 warning(s) and 0 error(s)" "$f.verify" ||
        { fail "fitsverify on $f"; cat "$f.verify"; }
done

# ---------------------------------------------------------------------------
# 3. Bad inputs: documented exit code, nothing written.
# ---------------------------------------------------------------------------
"$CLEF_PYTHON" - <<'EOF'
import numpy as np
from astropy.io import fits

def table(name, nside=8, n=768, ordering="RING", explicit=None, drop=()):
    cols = [fits.Column(name="T", format="D", array=np.arange(n, dtype=float))]
    if explicit is not None:
        cols.insert(0, fits.Column(name="PIXEL", format="K", array=np.array(explicit)))
    h = fits.BinTableHDU.from_columns(cols)
    kw = {"PIXTYPE": "HEALPIX", "ORDERING": ordering, "NSIDE": nside,
          "INDXSCHM": "EXPLICIT" if explicit is not None else "IMPLICIT"}
    for k, x in kw.items():
        if k not in drop:
            h.header[k] = x
    fits.HDUList([fits.PrimaryHDU(), h]).writeto(name, overwrite=True)

table("no_nside.fits", drop=("NSIDE",))
table("nside_12.fits", nside=12, n=1728)
table("nside_mismatch.fits", nside=16, n=768)
table("no_ordering.fits", drop=("ORDERING",))
table("index_range.fits", n=3, explicit=[0, 5, 768])
table("index_repeat.fits", n=3, explicit=[0, 5, 5])
fits.HDUList([fits.PrimaryHDU(np.zeros((4, 4)))]).writeto("image_only.fits", overwrite=True)
table("map8.fits")
table("mask16.fits", nside=16, n=3072)
h = fits.BinTableHDU.from_columns([fits.Column(name="W", format="E",
                                               array=np.full(768, 0.5, np.float32))])
for k, x in {"PIXTYPE": "HEALPIX", "ORDERING": "RING", "NSIDE": 8}.items():
    h.header[k] = x
h.data["W"][10] = -0.5
fits.HDUList([fits.PrimaryHDU(), h]).writeto("mask_negative.fits", overwrite=True)
h.data["W"][10] = 1.5
fits.HDUList([fits.PrimaryHDU(), h]).writeto("mask_above1.fits", overwrite=True)
h.data["W"][10] = 1.0
h.header["COORDSYS"] = "E"
fits.HDUList([fits.PrimaryHDU(), h]).writeto("mask_ecliptic.fits", overwrite=True)
EOF
: > empty.fits
printf 'SIMPLE? no, this is a text file\n' > text.fits
head -c 5000 full_f64.fits > truncated.fits

# expect CODE DESCRIPTION -- clef arguments: the exit code must match and the
# folder must not gain any file (no output, no leftover temporary file).
expect() {
    code=$1; what=$2; shift 3
    before=$(ls -A | sort)
    set +e
    "$CLEF_BIN" "$@" > out.log 2> err.log
    rc=$?
    set -e
    rm -f out.log
    after=$(ls -A | grep -v '^err.log$' | sort)
    before=$(printf '%s\n' "$before" | grep -v '^err.log$' | grep -v '^out.log$' || true)
    if [ "$rc" -ne "$code" ]; then
        fail "$what: exit $rc, expected $code ($(cat err.log))"
    elif [ "$before" != "$after" ]; then
        fail "$what: files were written"
    elif ! grep -q "clef" err.log; then
        fail "$what: no error message"
    else
        echo "ok: $what -> exit $rc: $(head -n 1 err.log)"
    fi
}
# 5 = CLI_EXIT_FORMAT, 4 = CLI_EXIT_IO, 3 = CLI_EXIT_INVALID
expect 5 "empty file" -- convert empty.fits out.fits
expect 5 "text file named .fits" -- convert text.fits out.fits
expect 5 "truncated FITS" -- convert truncated.fits out.fits
expect 5 "FITS with no binary table" -- convert image_only.fits out.fits
expect 5 "NSIDE missing" -- convert no_nside.fits out.fits
expect 5 "NSIDE not a power of two" -- convert nside_12.fits out.fits
expect 5 "NSIDE disagrees with the pixel count" -- convert nside_mismatch.fits out.fits
expect 5 "ORDERING missing" -- convert no_ordering.fits out.fits
expect 5 "explicit index out of range" -- convert index_range.fits out.fits
expect 5 "explicit index repeated" -- convert index_repeat.fits out.fits
expect 3 "unknown column name" -- convert --column NOPE map8.fits out.fits
expect 3 "unknown HDU" -- convert --hdu 7 map8.fits out.fits
expect 4 "missing file" -- convert does_not_exist.fits out.fits
expect 3 "map and mask of different nside" -- inspect --mask mask16.fits map8.fits
expect 3 "mask with a negative value" -- inspect --mask mask_negative.fits map8.fits
expect 3 "mask with a value above 1" -- inspect --mask mask_above1.fits map8.fits
expect 2 "bad option" -- inspect --no-such-option map8.fits
expect 4 "unwritable output" -- convert map8.fits no/such/dir/out.fits
for f in empty text truncated image_only no_nside nside_12 nside_mismatch \
         index_range index_repeat; do
    expect 5 "inspect $f.fits" -- inspect "$f.fits"
done
"$CLEF_BIN" inspect --mask mask16.fits map8.fits 2> err.log || true
grep -q "nside 8" err.log && grep -q "nside 16" err.log || fail "nside mismatch message"
# A mask in another coordinate system: refused, accepted when overridden.
"$CLEF_BIN" convert map8.fits map8_g.fits
"$CLEF_PYTHON" -c "
from astropy.io import fits
with fits.open('map8_g.fits', mode='update') as f: f[1].header['COORDSYS'] = 'G'
"
expect 3 "map and mask in different COORDSYS" -- inspect --mask mask_ecliptic.fits map8_g.fits
"$CLEF_BIN" inspect --allow-coord-mismatch --mask mask_ecliptic.fits map8_g.fits > /dev/null \
    2> err.log || fail "--allow-coord-mismatch refused"
grep -q "warning" err.log || fail "no warning for the coordinate override"

rm -f err.log
cd /
rm -rf "$T"
if [ "$failures" -ne 0 ]; then
    echo "$failures check(s) failed"
    exit 1
fi
echo "all map interop checks passed"

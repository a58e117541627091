#!/bin/sh
# clef spectrum --run: a run file of three fields (one with two noise
# splits), outputs read back by astropy/json/numpy, the pair of a single
# map equal to the one-pair run, each map transformed once, and bad run
# files (unknown key, missing map, nside mismatch, a pair naming an unknown
# field, a duplicated name, not YAML) refused with exit 3, the line and key
# named, and nothing written (docs/run-files.md, docs/exit-codes.md).
set -u
T="$CLEF_TEST_TMP/spectrum-run"
rm -rf "$T"
mkdir -p "$T" || exit 1
fail() { echo "FAIL: $*"; exit 1; }
C="$CLEF_BIN"

"$C" simulate --quiet --nside 32 --model --seed 3 --noise-depth 30 --splits 2 \
    --coordsys G --output "$T/a.fits" || fail "simulate a"
"$C" simulate --quiet --nside 32 --model --seed 4 --noise-depth 30 --coordsys G \
    --output "$T/b.fits" || fail "simulate b"
"$C" simulate --quiet --nside 16 --model --seed 4 --coordsys G --output "$T/small.fits" \
    || fail "simulate small"
"$C" mask --quiet --nside 32 --latitude-cut 15 --taper c2 --taper-width 10 --coordsys G \
    --output "$T/mask.fits" || fail "mask"
"$C" mask --quiet --nside 32 --latitude-cut 25 --taper c2 --taper-width 10 --coordsys G \
    --output "$T/mask2.fits" || fail "mask2"

cat > "$T/night.yaml" <<'YAML'
# three fields; paths are relative to this file
fields:
  - name: a
    maps: [a_split1.fits, a_split2.fits]
    mask: mask.fits
  - name: b
    maps: b.fits
    mask: mask.fits
  - name: c
    maps: b.fits
    mask: mask2.fits
spectrum:
  bin-width: 16
  output: out/night
YAML
mkdir -p "$T/out"
"$C" spectrum --run "$T/night.yaml" > "$T/run.txt" 2> "$T/err.txt" \
    || fail "run exit $?: $(cat "$T/err.txt")"
for f in night.fits night.json night-a-a.csv night-a-b.csv night-a-c.csv night-b-b.csv \
         night-b-c.csv night-c-c.csv; do
    [ -s "$T/out/$f" ] || fail "missing output $f"
done
fitsverify -q "$T/out/night.fits" | grep -q "verification OK" \
    || fail "fitsverify: $(fitsverify "$T/out/night.fits")"
"$C" spectrum --quiet "$T/b.fits" --mask "$T/mask.fits" --bin-width 16 --no-peak --format fits \
    --output "$T/one" 2> "$T/err1.txt" || fail "one-pair run: $(cat "$T/err1.txt")"

"$CLEF_PYTHON" - "$T" <<'PY' || fail "outputs"
import json, sys
import numpy as np
from astropy.io import fits
t = sys.argv[1]
j = json.load(open(t + "/out/night.json"))
assert j["program"] == "clef" and len(j["pairs"]) == 6, j["pairs"]
assert j["map_transforms"] == 4, j["map_transforms"]  # a: 2 splits, b and c: 1 each
names = [p["name"] for p in j["pairs"]]
assert names == ["a x a", "a x b", "a x c", "b x b", "b x c", "c x c"], names
h = fits.open(t + "/out/night.fits")
nb = j["nbins"]
for n in names:
    d = h["BANDPOWER " + n].data
    assert len(d) == nb and h["BANDPOWER " + n].header["PAIR"] == n
    assert h["BANDCOV " + n].data.shape == (nb, nb)
    rows = [r for r in open(t + "/out/night-%s-%s.csv" % tuple(n.split(" x ")))
            if not r.startswith("#")]
    col = rows[0].strip().split(",").index("d_band_uK2")
    csv = np.array([float(r.split(",")[col]) for r in rows[1:]])
    assert np.allclose(csv, d["D_BAND"], rtol=1e-9), n
jc = h["JOINTCOV"].data
assert jc.shape == (6 * nb, 6 * nb) and np.allclose(jc, jc.T)
# diagonal blocks are the tables' own covariances
for k, n in enumerate(names):
    assert np.allclose(jc[k*nb:(k+1)*nb, k*nb:(k+1)*nb], h["BANDCOV " + n].data, rtol=1e-12)
# the single map's pair equals the one-pair run (same estimator): 1e-10
one = fits.open(t + "/one.fits")["BANDPOWER"].data["D_BAND"]
assert np.allclose(h["BANDPOWER b x b"].data["D_BAND"], one, rtol=1e-10, atol=0), \
    (h["BANDPOWER b x b"].data["D_BAND"], one)
PY

# The run's figure (docs/figures.md, "Several pairs"): 6 pairs overlaid with
# a legend by default, a grid on request; PNG sizes as documented.
"$C" plot pairs --quiet "$T/out/night.fits" -o "$T/night.png" 2> "$T/plot.err" \
    || fail "plot pairs: $(cat "$T/plot.err")"
"$C" plot pairs --quiet "$T/out/night.fits" -o "$T/night-grid.png" --arrange grid \
    --columns 2 2> "$T/plot.err" || fail "plot pairs grid: $(cat "$T/plot.err")"
"$CLEF_PYTHON" - "$T" <<'PY' || fail "figure sizes"
import struct, sys
def size(p):  # PNG IHDR: width, height (ISO/IEC 15948)
    b = open(p, "rb").read(24)
    assert b[:8] == b"\x89PNG\r\n\x1a\n", p
    return struct.unpack(">II", b[16:24])
assert size(sys.argv[1] + "/night.png") == (1000, 620), size(sys.argv[1] + "/night.png")
# 6 pairs in 2 columns: 3 rows of 300 x 230, at least 900 wide, margins 60 x 90
assert size(sys.argv[1] + "/night-grid.png") == (900, 3 * 230 + 90)
PY

# Bad run files: exit 3, the line and key named, nothing written.
bad() {  # name, expected text, yaml
    printf '%s\n' "$3" > "$T/$1.yaml"
    "$C" spectrum --run "$T/$1.yaml" -o "$T/bad-$1" 2> "$T/$1.err"
    rc=$?
    [ $rc -eq 3 ] || fail "$1: exit $rc, expected 3: $(cat "$T/$1.err")"
    grep -q "$2" "$T/$1.err" || fail "$1: message '$(cat "$T/$1.err")' lacks '$2'"
    ls "$T" | grep -q "^bad-$1" && fail "$1: an output was written"
    return 0
}
bad unknown "line 4: unknown key 'mask2'" 'fields:
  - name: a
    maps: a_split1.fits
    mask2: mask.fits'
bad nomaps "line 2: field 'a' has no 'maps'" 'fields:
  - name: a
    mask: mask.fits'
bad missing "line 3: field 'a' key 'maps'" 'fields:
  - name: a
    maps: nowhere.fits
    mask: mask.fits'
bad nside "line 7: field 'b' key 'maps': map .*nside 16" 'fields:
  - name: a
    maps: b.fits
    mask: mask.fits
  - name: b
    mask: mask.fits
    maps: small.fits'
bad pair "line 6: 'pairs' names field 'z'" 'fields:
  - name: a
    maps: b.fits
    mask: mask.fits
pairs:
  - [a, z]'
bad dup "line 5: field name 'a' is used twice (first at line 2)" 'fields:
  - name: a
    maps: b.fits
    mask: mask.fits
  - name: a
    maps: b.fits
    mask: mask.fits'
# Maps are read one at a time while the estimator runs (docs/run-files.md):
# their headers are checked first, so a frame that differs from the mask's
# is refused before any work, and a map whose values cannot be read (an
# explicit-index table listing a pixel twice: its header is fine) still
# names its line and key, with nothing written.
"$C" simulate --quiet --nside 32 --model --seed 5 --coordsys E --output "$T/ecl.fits" \
    || fail "simulate ecl"
"$CLEF_PYTHON" - "$T/twice.fits" <<'PY' || fail "explicit-index file"
import sys
import numpy as np
from astropy.io import fits
npix = 12 * 32 ** 2
pix = np.arange(npix, dtype=np.int64)
pix[5] = 4  # pixel 4 listed twice
cols = [fits.Column(name="PIXEL", format="K", array=pix),
        fits.Column(name="T", format="D", array=np.zeros(npix), unit="uK")]
t = fits.BinTableHDU.from_columns(cols)
for k, v in (("PIXTYPE", "HEALPIX"), ("ORDERING", "RING"), ("NSIDE", 32),
             ("INDXSCHM", "EXPLICIT"), ("OBJECT", "PARTIAL"), ("COORDSYS", "G")):
    t.header[k] = v
fits.HDUList([fits.PrimaryHDU(), t]).writeto(sys.argv[1], overwrite=True)
PY
"$C" inspect "$T/twice.fits" > /dev/null 2>&1 && fail "twice.fits should not read"
bad frame "line 5: field 'b' key 'mask': coordinate systems differ" 'fields:
  - name: a
    maps: b.fits
    mask: mask.fits
  - name: b
    maps: ecl.fits
    mask: mask.fits'
bad values "line 7: field 'b' key 'maps': .*twice.fits" 'fields:
  - name: a
    maps: b.fits
    mask: mask.fits
  - name: b
    mask: mask.fits
    maps: twice.fits'
bad yaml "line 3: not valid YAML" 'fields:
  - name: a
   maps: [b.fits'
bad setting "line 6: unknown key 'lmin' in 'spectrum'" 'fields:
  - name: a
    maps: b.fits
    mask: mask.fits
spectrum:
  lmin: 3'
exit 0

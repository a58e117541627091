#!/bin/sh
# clef plot: every figure kind renders to PNG (size as asked: IHDR read by
# Python's struct), SVG (well-formed: Python xml.etree) and PDF (pdfinfo from
# poppler-utils); error paths give the documented exit codes and leave no
# output file.  Inputs are written here: a plain band-power table, HEALPix
# FITS maps (astropy), a geometry JSON (Python json).
set -u
BIN=${CLEF_BIN:-build/clef}
PY=${CLEF_PYTHON:-/usr/bin/python3}
T=$(mktemp -d "${CLEF_TEST_TMP:-/tmp}/plot-XXXXXX")
fails=0
fail() { echo "FAIL: $*"; fails=$((fails + 1)); }

# expect CODE CMD...: run CMD, check its exit code.
expect() {
    want=$1; shift
    "$@" >"$T/out" 2>&1; got=$?
    [ "$got" -eq "$want" ] || { fail "exit $got (want $want): $*"; sed 's/^/    /' "$T/out"; }
}

png_size() { "$PY" -c '
import struct, sys
b = open(sys.argv[1], "rb").read(24)
assert b[:8] == b"\x89PNG\r\n\x1a\n" and b[12:16] == b"IHDR"
print("%d %d" % struct.unpack(">II", b[16:24]))' "$1"; }
svg_ok() { "$PY" -c 'import sys, xml.etree.ElementTree as E; E.parse(sys.argv[1])' "$1"; }

# Band powers: a peaked D_l (illustrative), "l_eff D err" rows.
"$PY" - "$T" <<'PYEOF'
import sys, math, json
import numpy as np
from astropy.io import fits
t = sys.argv[1]
with open(t + "/bp.txt", "w") as f:
    for b in range(25):
        l = 20 + 40 * b
        f.write("%g %.6f %.6f\n" % (l, 1000 + 4500 * math.exp(-((l - 220) / 90) ** 2), 150 + 0.3 * l))
with open(t + "/theory.txt", "w") as f:
    for l in range(2, 1200):
        f.write("%d %.6f\n" % (l, 1000 + 4500 * math.exp(-((l - 220) / 90) ** 2)))
# The same curve in the spectrum layout of clef's model files (C_l, D_l).
with open(t + "/model.txt", "w") as f:
    f.write("# a model spectrum\n# columns: l C_l D_l\n")
    for l in range(0, 1500):
        d = 1000 + 4500 * math.exp(-((l - 220) / 90) ** 2) if l >= 2 else 0.0
        c = 2 * math.pi * d / (l * (l + 1)) if l >= 2 else 0.0
        f.write("%d %.9e %.9e\n" % (l, c, d))
def write_map(path, nside, values, unit=None):
    cols = [fits.Column(name="TEMPERATURE", format="D", array=values, unit=unit)]
    h = fits.BinTableHDU.from_columns(cols)
    for k, v in (("PIXTYPE", "HEALPIX"), ("ORDERING", "RING"), ("NSIDE", nside),
                 ("INDXSCHM", "IMPLICIT"), ("FIRSTPIX", 0), ("LASTPIX", 12 * nside ** 2 - 1),
                 ("COORDSYS", "G")):
        h.header[k] = v
    fits.HDUList([fits.PrimaryHDU(), h]).writeto(path, overwrite=True)
npix = 12 * 16 ** 2
rng = np.random.default_rng(8)
write_map(t + "/map.fits", 16, rng.normal(0, 70, npix), "uK")
mask = np.ones(npix); mask[: npix // 3] = 0
write_map(t + "/mask.fits", 16, mask)
write_map(t + "/mask8.fits", 8, np.ones(12 * 64))
# nside 64 white noise and a band mask, for a table made by clef spectrum
npix = 12 * 64 ** 2
write_map(t + "/noise64.fits", 64, rng.normal(0, 50, npix), "uK")
band = np.ones(npix); band[npix // 2 - npix // 10: npix // 2 + npix // 10] = 0
write_map(t + "/band64.fits", 64, band)
x = np.linspace(-0.1, 0.1, 101)
json.dump({"omega_k": {"best": -0.01, "lo68": -0.03, "hi68": 0.01, "lo95": -0.05, "hi95": 0.03},
           "classification": "flat", "angular_scale_deg": 0.81, "l_peak": 221.0, "l_peak_err": 6.0,
           "curve": {"omega_k": list(x), "posterior": list(np.exp(-0.5 * ((x + 0.01) / 0.02) ** 2))}},
          open(t + "/geo.json", "w"))
PYEOF
[ -f "$T/geo.json" ] || { echo "FAIL: cannot write the inputs"; exit 1; }

# spectrum
expect 0 "$BIN" plot spectrum "$T/bp.txt" -o "$T/s.png" --width 640 --height 480 \
    --model-curve "$T/theory.txt" --compare "$T/bp.txt" --compare-label again
[ "$(png_size "$T/s.png")" = "640 480" ] || fail "spectrum PNG size $(png_size "$T/s.png")"
expect 0 "$BIN" plot spectrum "$T/bp.txt" -o "$T/s.svg" --log-l --quiet --model-curve "$T/model.txt"
svg_ok "$T/s.svg" || fail "spectrum SVG not well-formed"
expect 0 "$BIN" plot spectrum "$T/bp.txt" -o "$T/s.pdf" --no-peak --title "T"
pdfinfo "$T/s.pdf" >/dev/null 2>&1 || fail "spectrum PDF does not open"

# a table written by clef spectrum itself (header keys for the title, a
# recorded "no peak" for white noise: drawn without a marker)
expect 0 "$BIN" spectrum "$T/noise64.fits" --mask "$T/band64.fits" -o "$T/sp" --quiet
expect 0 "$BIN" plot spectrum "$T/sp.fits" -o "$T/sp.svg"
svg_ok "$T/sp.svg" || fail "SVG of a clef spectrum table not well-formed"
expect 0 "$BIN" plot spectrum "$T/sp.csv" -o "$T/sp.png" --log-l

# map, mask, map x mask
expect 0 "$BIN" plot map "$T/map.fits" -o "$T/m.png" --width 400
set -- $(png_size "$T/m.png")
[ "$1" = 400 ] && [ "$2" -gt 200 ] && [ "$2" -lt 300 ] || fail "map PNG size $1 x $2"
expect 0 "$BIN" plot map "$T/mask.fits" -o "$T/k.svg" --width 300
svg_ok "$T/k.svg" || fail "mask SVG not well-formed"
expect 0 "$BIN" plot map "$T/map.fits" --mask "$T/mask.fits" -o "$T/mk.pdf" --range -100,100 \
    --no-grid --transparent
pdfinfo "$T/mk.pdf" >/dev/null 2>&1 || fail "map x mask PDF does not open"

# curvature
expect 0 "$BIN" plot curvature "$T/geo.json" -o "$T/c.png" --width 500 --height 320
[ "$(png_size "$T/c.png")" = "500 320" ] || fail "curvature PNG size"
expect 0 "$BIN" plot curvature "$T/geo.json" -o "$T/c.svg" --omega-total
svg_ok "$T/c.svg" || fail "curvature SVG (Omega_total) not well-formed"
# The JSON that clef geometry itself writes.
expect 0 "$BIN" geometry --peak-l 220 --peak-l-err 3 --json "$T/geo_clef.json" --quiet
expect 0 "$BIN" plot curvature "$T/geo_clef.json" -o "$T/c2.pdf"
pdfinfo "$T/c2.pdf" >/dev/null 2>&1 || fail "curvature PDF from clef geometry does not open"

# errors: usage 2, invalid 3, I/O 4, format 5, unsupported 7; no output left
expect 2 "$BIN" plot
expect 2 "$BIN" plot histogram "$T/bp.txt" -o "$T/e1.png"
expect 2 "$BIN" plot spectrum "$T/bp.txt"
expect 2 "$BIN" plot map "$T/map.fits" -o "$T/e2.png" --log-l
expect 2 "$BIN" plot spectrum "$T/bp.txt" -o "$T/e3.png" --mask "$T/mask.fits"
expect 2 "$BIN" plot map "$T/map.fits" -o "$T/e4.png" --height 300
expect 2 "$BIN" plot map "$T/map.fits" -o "$T/e4.png" --omega-total
expect 2 "$BIN" plot map "$T/map.fits" -o "$T/e5.png" --range 5,1
expect 2 "$BIN" plot spectrum "$T/bp.txt" -o "$T/e6.png" --width ten
expect 7 "$BIN" plot spectrum "$T/bp.txt" -o "$T/e7.jpg"
expect 4 "$BIN" plot spectrum "$T/absent.txt" -o "$T/e8.png"
expect 4 "$BIN" plot map "$T/absent.fits" -o "$T/e9.png"
expect 4 "$BIN" plot spectrum "$T/bp.txt" -o "$T/nodir/e10.png"
expect 3 "$BIN" plot map "$T/map.fits" --mask "$T/mask8.fits" -o "$T/e11.png"
printf '# columns: l C_l\n2 1.0\n4 1.0\n' > "$T/gap.txt"
expect 5 "$BIN" plot spectrum "$T/bp.txt" -o "$T/e13.png" --model-curve "$T/gap.txt"
echo '{"omega_k": ' > "$T/bad.json"
expect 5 "$BIN" plot curvature "$T/bad.json" -o "$T/e12.png"
for i in 1 2 3 4 5 6 7 8 9 11 12 13; do
    ls "$T"/e$i.* >/dev/null 2>&1 && fail "output e$i left behind"
done
ls -a "$T" | grep -q '\.clef-tmp\.' && fail "temporary file left behind"
expect 0 "$BIN" plot --help

rm -rf "$T"
[ "$fails" -eq 0 ] || { echo "$fails failure(s)"; exit 1; }
echo "plot.sh: all passed"

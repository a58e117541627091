#!/bin/sh
# Write the seed corpora of the fuzz harnesses from small files made by clef
# itself and by astropy (Debian's python3-astropy, an independent FITS
# writer): sh tests/fuzz/make-seeds.sh [BUILD].  The seeds are committed;
# rerun this only to refresh them.  Regression inputs of fixed findings live
# beside them as regress-* files and are never regenerated.
set -eu
BUILD=${1:-build}
top=$(cd "$(dirname "$0")/../.." && pwd)
clef="$top/$BUILD/clef"
py=/usr/bin/python3
c="$top/tests/fuzz/corpus"
w=$(mktemp -d); trap 'rm -rf "$w"' EXIT
export CLEF_CACHE_DIR="$w/cache" OMP_NUM_THREADS=1
for h in map table spectrum_text bins alm cache json holes; do mkdir -p "$c/fuzz_$h"; done

# Maps: RING and NESTED, float32 and float64, gzip, explicit index (astropy).
"$clef" model --lmax 40 --output "$w/cl.txt" --quiet
"$clef" simulate --nside 2 --cl "$w/cl.txt" --seed 3 --output "$c/fuzz_map/seed-nside2.fits" --quiet \
    --alm-output "$c/fuzz_alm/seed-alm.fits"
"$clef" simulate --nside 4 --cl "$w/cl.txt" --seed 4 --float32 --output "$w/n4.fits" --quiet
cp "$w/n4.fits" "$c/fuzz_map/seed-nside4-f32.fits"
"$clef" simulate --nside 1 --cl "$w/cl.txt" --output "$c/fuzz_map/seed-nside1.fits.gz" --quiet
"$clef" convert --help >/dev/null
"$py" - "$c/fuzz_map" <<'PY'
import sys, numpy as np
from astropy.io import fits
d = sys.argv[1]
def tab(cols, **kw):
    h = fits.BinTableHDU.from_columns(cols)
    for k, v in kw.items(): h.header[k] = v
    return fits.HDUList([fits.PrimaryHDU(), h])
tab([fits.Column(name='PIXEL', format='K', array=np.array([0, 5, 7])),
     fits.Column(name='SIGNAL', format='E', array=np.array([1., 2., -1.6375e30]))],
    PIXTYPE='HEALPIX', ORDERING='NESTED', NSIDE=1, INDXSCHM='EXPLICIT', OBJECT='PARTIAL',
    COORDSYS='G').writeto(d + '/seed-explicit.fits', overwrite=True)
tab([fits.Column(name='T', format='4I', array=np.arange(48, dtype=np.int16).reshape(12, 4))],
    PIXTYPE='HEALPIX', ORDERING='RING', NSIDE=2, TSCAL1=0.5, TZERO1=3.0, TNULL1=7,
    TUNIT1='mK').writeto(d + '/seed-vector-scaled.fits', overwrite=True)
PY

# Band-power tables (FITS, CSV) and covariance CSV, from a real run.
"$clef" simulate --nside 16 --cl "$w/cl.txt" --lmax 40 --seed 5 --output "$w/m16.fits" --quiet
"$py" - "$w/mask16.fits" <<'PY'
import sys, numpy as np
from astropy.io import fits
h = fits.BinTableHDU.from_columns([fits.Column(name='MASK', format='E', array=np.ones(3072))])
h.header['PIXTYPE'] = 'HEALPIX'; h.header['ORDERING'] = 'RING'; h.header['NSIDE'] = 16
fits.HDUList([fits.PrimaryHDU(), h]).writeto(sys.argv[1], overwrite=True)
PY
"$clef" spectrum "$w/m16.fits" --mask "$w/mask16.fits" --lmax 40 --bin-width 10 \
    --output "$w/bp" --quiet || true
for f in "$w"/bp*; do
    case "$f" in
    *.fits) cp "$f" "$c/fuzz_table/seed-table.fits" ;;
    *cov*.csv) cp "$f" "$c/fuzz_table/seed-cov.csv" ;;
    *.csv) cp "$f" "$c/fuzz_table/seed-table.csv" ;;
    *.json) cp "$f" "$c/fuzz_json/seed-spectrum.json" ;;
    esac
done
printf '# l_eff D err\n10 1000 50\n20 2000 60\n30 3000 70\n' > "$c/fuzz_table/seed-text3.txt"
printf '2 11 6.5 100 2000 40\n12,21,16.5,50,3000,45\n' > "$c/fuzz_table/seed-text6.txt"

# Spectrum / noise / beam / transfer text tables.
head -n 12 "$w/cl.txt" > "$c/fuzz_spectrum_text/seed-cl.txt"
printf '# columns: l D_l\n2 1000\n3 1100\n4 1200\n5,1300\n' > "$c/fuzz_spectrum_text/seed-dl.txt"
printf '# beam\n0 1\n1 0.999\n2 0.998\n3 0.995\n4 0.99\n5 0.98\n6 0.97\n7 0.96\n8 0.95 extra\n' \
    > "$c/fuzz_spectrum_text/seed-beam.txt"

# Bin edges.
printf '# lo hi\n2 10\n11 20\n21 30\n' > "$c/fuzz_bins/seed-ranges.txt"
printf '2\n12\n22\n31\n' > "$c/fuzz_bins/seed-edges.txt"

# Cache files: a real mask-spectra and coupling entry from the run above.
for f in "$w"/cache/*.bin; do
    [ -f "$f" ] || continue
    b=$(basename "$f" | cut -c1-12)
    [ -f "$c/fuzz_cache/seed-$b.bin" ] && continue
    # keep only small ones (the fuzzer's max_len)
    if [ "$(wc -c < "$f")" -le 65536 ]; then cp "$f" "$c/fuzz_cache/seed-$b.bin"; fi
done

# Geometry JSON (read by clef plot curvature).
"$clef" geometry --peak-l 220 --peak-l-err 3 --json "$c/fuzz_json/seed-geometry.json" --quiet 2>/dev/null || \
    "$clef" geometry --peak-l 220 --peak-l-err 3 --output "$c/fuzz_json/seed-geometry.json" --quiet

# Holes.
cp "$top/masks/halcyon-sources.txt" "$c/fuzz_holes/seed-sources.txt"
printf '# lon lat radius\n10 20 30\n-5,45.5,60\n' > "$c/fuzz_holes/seed-small.txt"
ls -l "$c"/*

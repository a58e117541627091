#!/bin/sh
# The main job on the shipped demo data (demo_maps/README.md): the
# cross-spectrum of two noise splits with the wide-survey mask, its first
# acoustic peak, what the peak says about curvature, and the figures.
set -eu
BUILD=${1:-build}
CLEF="$BUILD/clef"
OUT=${CLEF_DEMO_OUT:-out/demo}
mkdir -p "$OUT"

echo "== clef spectrum: band powers and first peak of the demo sky"
"$CLEF" spectrum demo_maps/halcyon_split1.fits.gz demo_maps/halcyon_split2.fits.gz \
    --mask masks/halcyon-wide.fits.gz --beam-fwhm 10 --output "$OUT/halcyon"

echo
echo "== clef geometry: curvature from the measured peak"
"$CLEF" geometry "$OUT/halcyon.fits" --json "$OUT/halcyon-geometry.json"

if "$CLEF" plot --help >/dev/null 2>&1; then
    echo
    echo "== clef plot: figures"
    "$CLEF" plot spectrum "$OUT/halcyon.fits" --output "$OUT/halcyon-spectrum.png"
    "$CLEF" plot map demo_maps/halcyon_split1.fits.gz --mask masks/halcyon-wide.fits.gz \
        --output "$OUT/halcyon-map.png"
    "$CLEF" plot curvature "$OUT/halcyon-geometry.json" --output "$OUT/halcyon-curvature.png"
fi
echo
echo "Outputs in $OUT/:"
ls -1 "$OUT"

#!/bin/sh
# clef simulate --polarization then clef spectrum --polarization: the T/Q/U
# file has the HEALPix columns and POLCCONV = COSMO (astropy), and the six
# band powers of the full-sky simulation agree with the input spectra
# through the written windows within 4 quoted sigma (numpy); TE^2 > TT EE is
# exit 3, a malformed spectrum file exit 5, a missing --cl exit 2, and no
# failed run leaves a file.
set -eu
: "${CLEF_BIN:?}" "${CLEF_PYTHON:?}" "${CLEF_TEST_TMP:?}"
T=$(mktemp -d "$CLEF_TEST_TMP/simulate-pol-XXXXXX")
cd "$T"
failures=0
fail() { echo "FAIL: $*"; failures=$((failures + 1)); }

"$CLEF_PYTHON" - <<'PY'
import numpy as np
l = np.arange(0, 96)
tt = 3000.0 / (l + 10.0) ** 2
ee = 60.0 / (l + 15.0) ** 2
bb = 0.2 * ee
te = 0.6 * np.sqrt(tt * ee)
with open("cl.txt", "w") as f:
    f.write("# columns: l TT EE BB TE (C_l, uK^2)\n")
    for row in zip(l, tt, ee, bb, te):
        f.write("%d %.10g %.10g %.10g %.10g\n" % row)
with open("bad.txt", "w") as f:
    f.write("2 1 1 1 5\n")           # TE^2 > TT EE
with open("broken.txt", "w") as f:
    f.write("2 1 1 1\n")
import astropy.io.fits as fits
h = fits.BinTableHDU.from_columns([fits.Column(name="MASK", format="D", array=np.ones(12 * 32 * 32))])
h.header["PIXTYPE"] = "HEALPIX"; h.header["ORDERING"] = "RING"; h.header["NSIDE"] = 32
fits.HDUList([fits.PrimaryHDU(), h]).writeto("ones.fits")
PY

"$CLEF_BIN" simulate --polarization --nside 32 --cl cl.txt --seed 3 --no-pixel-window \
    -o tqu.fits --quiet || fail "polarized simulation"
"$CLEF_BIN" spectrum --polarization tqu.fits --mask ones.fits --no-pixel-window \
    --bin-width 10 --iterations 3 --no-cache -o pol --quiet || fail "its six spectra"
"$CLEF_PYTHON" - <<'PY' || fail "astropy/numpy checks"
import numpy as np
from astropy.io import fits
with fits.open("tqu.fits") as h:
    assert h[1].columns.names == ["TEMPERATURE", "Q_POLARISATION", "U_POLARISATION"]
    assert h[1].header["POLCCONV"] == "COSMO"
    assert h[1].header["NSIDE"] == 32
cl = np.loadtxt("cl.txt")
l = cl[:, 0]
dl = l * (l + 1) / (2 * np.pi)
inp = {"TT": cl[:, 1], "EE": cl[:, 2], "BB": cl[:, 3], "TE": cl[:, 4],
       "TB": 0 * l, "EB": 0 * l}
with fits.open("pol.fits") as h:
    for k in range(1, 7):
        bp = h["BANDPOWER", k]
        name = bp.header["SPECTRUM"]
        win = h["BANDWIN", k].data
        n = win.shape[1]
        expect = win @ (dl[:n] * inp[name][:n])
        z = (bp.data["D_BAND"] - expect) / bp.data["D_SIGMA"]
        assert np.all(np.abs(z) < 4), (name, z)
PY

set +e
"$CLEF_BIN" simulate --polarization --nside 32 --cl bad.txt -o b.fits --quiet 2>err.txt
[ $? -eq 3 ] || fail "TE^2 > TT EE: expected exit 3"
grep -q "l = 2" err.txt || fail "the message names the multipole"
"$CLEF_BIN" simulate --polarization --nside 32 --cl broken.txt -o c.fits --quiet 2>/dev/null
[ $? -eq 5 ] || fail "malformed spectrum file: expected exit 5"
"$CLEF_BIN" simulate --polarization --nside 32 -o d.fits --quiet 2>/dev/null
[ $? -eq 2 ] || fail "missing --cl: expected exit 2"
set -e
for f in b.fits c.fits d.fits; do
    [ -e "$f" ] && fail "a failed run left $f"
done

[ "$failures" -eq 0 ] || exit 1
echo "simulate_pol.sh: all checks passed"

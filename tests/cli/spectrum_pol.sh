#!/bin/sh
# clef spectrum --polarization end to end: a T/Q/U table written by astropy
# gives six spectra in one FITS file (BANDPOWER HDUs with EXTVER 1..6 and
# SPECTRUM keywords, read back by astropy), six CSV files and a JSON summary;
# a missing POLCCONV is a recorded warning, an unknown one exit 5, a missing
# U column exit 3, a bad --polcconv exit 2; failed runs write nothing.
set -eu
: "${CLEF_BIN:?}" "${CLEF_PYTHON:?}" "${CLEF_TEST_TMP:?}"
T=$(mktemp -d "$CLEF_TEST_TMP/spectrum-pol-XXXXXX")
cd "$T"
failures=0
fail() { echo "FAIL: $*"; failures=$((failures + 1)); }

"$CLEF_PYTHON" - <<'PY'
import numpy as np
from astropy.io import fits
ns = 16; n = 12 * ns * ns
rng = np.random.default_rng(3)
T, Q, U = (rng.normal(0, s, n) for s in (100.0, 5.0, 5.0))
def write(name, cols, conv):
    t = fits.BinTableHDU.from_columns([fits.Column(name=k, format="D", unit="uK", array=v)
                                       for k, v in cols])
    h = t.header
    h["PIXTYPE"] = "HEALPIX"; h["ORDERING"] = "RING"; h["NSIDE"] = ns; h["INDXSCHM"] = "IMPLICIT"
    if conv:
        h["POLCCONV"] = conv
    fits.HDUList([fits.PrimaryHDU(), t]).writeto(name, overwrite=True)
tqu = [("TEMPERATURE", T), ("Q_POLARISATION", Q), ("U_POLARISATION", U)]
write("tqu.fits", tqu, "COSMO")
write("noconv.fits", tqu, None)
write("weird.fits", tqu, "SOUTH")
write("tq.fits", tqu[:2], "COSMO")
write("mask.fits", [("MASK", np.ones(n))], None)
PY

"$CLEF_BIN" spectrum --polarization tqu.fits --mask mask.fits --bin-width 8 --no-cache \
    -o out --quiet || fail "polarized spectrum"
for s in TT TE TB EE EB BB; do
    [ -f "out-$s.csv" ] || fail "missing out-$s.csv"
done
[ -f out.fits ] && [ -f out.json ] || fail "missing out.fits or out.json"
"$CLEF_PYTHON" - <<'PY' || fail "astropy/json checks of the outputs"
import json
from astropy.io import fits
with fits.open("out.fits") as h:
    bp = [x for x in h if x.name == "BANDPOWER"]
    assert [x.header["EXTVER"] for x in bp] == [1, 2, 3, 4, 5, 6], [x.header.get("EXTVER") for x in bp]
    assert [x.header["SPECTRUM"] for x in bp] == ["TT", "TE", "TB", "EE", "EB", "BB"]
    assert len([x for x in h if x.name == "BANDWIN"]) == 6
    n = len(bp[0].data)
    assert all(len(x.data) == n for x in bp)
j = json.load(open("out.json"))
assert j["polcconv"] == ["COSMO"], j["polcconv"]
assert set(j["spectra"]) == {"TT", "TE", "TB", "EE", "EB", "BB"}
assert len(j["spectra"]["EE"]["d_l"]) == n
assert j["spectra"]["EE"]["d_l"][0] > 0 and j["spectra"]["BB"]["d_l"][0] > 0
PY

"$CLEF_BIN" spectrum --polarization noconv.fits --mask mask.fits --bin-width 8 --no-cache \
    -o nc --quiet || fail "missing POLCCONV is not an error"
"$CLEF_PYTHON" -c "
import json; j = json.load(open('nc.json'))
assert j['polcconv'] == ['missing (COSMO)'], j['polcconv']
assert any('POLCCONV' in w for w in j['warnings']), j['warnings']
" || fail "missing POLCCONV warning in the JSON"

set +e
"$CLEF_BIN" spectrum --polarization weird.fits --mask mask.fits -o w --quiet 2>err.txt
[ $? -eq 5 ] || fail "POLCCONV = SOUTH: expected exit 5"
grep -q "POLCCONV = 'SOUTH'" err.txt || fail "the message names the keyword and value"
"$CLEF_BIN" spectrum --polarization tq.fits --mask mask.fits -o m --quiet 2>err.txt
[ $? -eq 3 ] || fail "missing U column: expected exit 3"
grep -q "tq.fits" err.txt || fail "the message names the file"
"$CLEF_BIN" spectrum --polarization tqu.fits --mask mask.fits --polcconv NORTH -o b --quiet 2>/dev/null
[ $? -eq 2 ] || fail "--polcconv NORTH: expected exit 2"
set -e
for p in w m b; do
    ls $p.* $p-* >/dev/null 2>&1 && fail "a failed run ($p) left an output"
done

# --pure-b: a tapered patch gives a pure BB (JSON flag, PURE_B keyword); the
# hard-edged patch it was made from is refused (exit 3) and writes nothing.
"$CLEF_BIN" mask --nside 16 --patch 30,-40,45 --output hard.fits --quiet || fail "clef mask (hard)"
"$CLEF_BIN" mask --nside 16 --patch 30,-40,45 --taper c2 --taper-width 20 --output soft.fits --quiet \
    || fail "clef mask (tapered)"
"$CLEF_BIN" spectrum --polarization tqu.fits --mask soft.fits --bin-width 8 --no-cache --pure-b \
    -o pure --quiet || fail "--pure-b on a tapered patch"
"$CLEF_PYTHON" - <<'PY' || fail "pure-B outputs"
import json
from astropy.io import fits
j = json.load(open("pure.json"))
assert j["pure_b"] is True and len(j["pure_b_window_tail"]) == 1, j
assert 0 <= j["pure_b_window_tail"][0] < 0.45
with fits.open("pure.fits") as h:
    bb = [x for x in h if x.name == "BANDPOWER" and x.header["SPECTRUM"] == "BB"][0]
    assert bb.header["PURE_B"] == 1
    ee = [x for x in h if x.name == "BANDPOWER" and x.header["SPECTRUM"] == "EE"][0]
    assert "PURE_B" not in ee.header
PY
set +e
"$CLEF_BIN" spectrum --polarization tqu.fits --mask hard.fits --bin-width 8 --no-cache --pure-b \
    -o hardout --quiet 2>err.txt
[ $? -eq 3 ] || fail "--pure-b with a hard-edged mask: expected exit 3"
grep -q "not smooth enough" err.txt || fail "the refusal says why: $(cat err.txt)"
set -e
ls hardout.* hardout-* >/dev/null 2>&1 && fail "the refused --pure-b run left an output"

[ "$failures" -eq 0 ] || exit 1
echo "spectrum_pol.sh: all checks passed"

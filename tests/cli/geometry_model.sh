#!/bin/sh
# clef model and clef geometry: outputs read back by Python (json, numpy,
# astropy), the peak taken from a band-power table, and the documented exit
# codes for bad input (docs/theory.md, docs/geometry.md).
set -u
T="$CLEF_TEST_TMP/geometry-cli"
mkdir -p "$T" || exit 1
fail() { echo "FAIL: $*"; exit 1; }

# --- clef model: text and FITS outputs -------------------------------------
"$CLEF_BIN" model --lmax 1000 --output "$T/planck.txt" > "$T/model.out" || fail "model exit $?"
grep -q "model peak  *l = 22[0-2]\." "$T/model.out" || fail "model peak line: $(cat "$T/model.out")"
"$CLEF_BIN" model --quiet --lmax 1000 --omega-k -0.05 --output "$T/closed.fits" > "$T/quiet.out" \
    || fail "model closed exit $?"
[ -s "$T/quiet.out" ] && fail "--quiet printed: $(cat "$T/quiet.out")"
# Columns l, C_l, D_l with D_l = l(l+1)C_l/2pi; the first peak (WMAP, Page
# et al. 2003: l = 220.1 +- 0.8) within 2%; the closed model's peak lower
# (l_1 ~ 220 Omega_tot^-1/2, common practice).
"$CLEF_PYTHON" - "$T" <<'PY' || fail "model outputs"
import sys, numpy as np
from astropy.io import fits
t = sys.argv[1]
a = np.loadtxt(t + "/planck.txt")
l, c, d = a[:, 0], a[:, 1], a[:, 2]
assert a.shape == (1001, 3) and (l == np.arange(1001)).all()
assert c[0] == 0 and c[1] == 0 and (c[2:] > 0).all()
assert np.allclose(d[2:], l[2:] * (l[2:] + 1) * c[2:] / (2 * np.pi), rtol=1e-9)
lp = l[100:400][np.argmax(d[100:400])]
assert abs(lp / 220.1 - 1) < 0.02, lp
h = fits.open(t + "/closed.fits")["SPECTRUM"]
assert h.header["OMEGA_K"] == -0.05 and h.columns["CL"].unit == "uK^2"
dc = h.data["DL"]
lc = h.data["L"][100:400][np.argmax(dc[100:400])]
assert lc < lp - 5, (lc, lp)
PY
# The written text spectrum is readable as a user spectrum: D_l-only copy.
"$CLEF_BIN" model --omega-b 0.03 --omega-k 0.9 > /dev/null 2>"$T/err.txt"
[ $? -eq 3 ] || fail "unphysical model: expected exit 3"
grep -q "Omega_Lambda" "$T/err.txt" || fail "message: $(cat "$T/err.txt")"
"$CLEF_BIN" model --lmax 1 > /dev/null 2>&1
[ $? -eq 2 ] || fail "--lmax 1: expected exit 2"
"$CLEF_BIN" model --h abc > /dev/null 2>&1
[ $? -eq 2 ] || fail "--h abc: expected exit 2"
"$CLEF_BIN" model --output "$T/no/such/dir/x.txt" > /dev/null 2>&1
[ $? -eq 4 ] || fail "unwritable output: expected exit 4"
"$CLEF_BIN" model --help | grep -q -- "--omega-k" || fail "model --help"

# --- clef geometry --json --------------------------------------------------
"$CLEF_BIN" geometry --peak-l 220.1 --peak-l-err 0.8 --json "$T/g.json" > "$T/g.out" \
    || fail "geometry exit $?"
grep -q "flat within errors" "$T/g.out" || fail "summary: $(cat "$T/g.out")"
grep -q "degeneracy" "$T/g.out" || fail "cautions missing: $(cat "$T/g.out")"
"$CLEF_PYTHON" - "$T/g.json" <<'PY' || fail "geometry JSON: $(head -c 2000 "$T/g.json")"
import sys, json
j = json.load(open(sys.argv[1]))
k = j["omega_k"]
assert k["lo95"] <= k["lo68"] <= k["best"] <= k["hi68"] <= k["hi95"]
assert j["classification"] == "flat" and k["lo95"] < 0 < k["hi95"]
assert j["l_peak"] == 220.1 and j["l_peak_err"] == 0.8
assert abs(j["angular_scale_deg"] - 180 / 220.1) < 1e-9
assert j["forward_model"]["used"] is False
c = j["curve"]
assert len(c["omega_k"]) == len(c["posterior"]) == 1201
assert max(c["posterior"]) == 1.0 and min(c["posterior"]) >= 0
assert abs(c["omega_k"][0] + 0.3) < 1e-12 and abs(c["omega_k"][-1] - 0.3) < 1e-12
assert len(j["cautions"]) >= 3 and "priors" in j and j["priors"]["h"]["sigma"] == 0.01
PY
# A closed universe's peak (the model's l_1 for Omega_k = -0.05 at the prior
# means is 205.5) with h fixed: classified closed, truth in the 68% interval.
"$CLEF_BIN" geometry --quiet --peak-l 205.54 --peak-l-err 1 --h-err 0 --samples 300 \
    --json "$T/closed.json" || fail "closed geometry exit $?"
"$CLEF_PYTHON" -c "
import json, sys
j = json.load(open(sys.argv[1])); k = j['omega_k']
assert j['classification'] == 'closed', j['classification']
assert k['lo68'] <= -0.05 <= k['hi68'], k
" "$T/closed.json" || fail "closed JSON"

# --- the peak from a band-power table --------------------------------------
"$CLEF_PYTHON" - "$T" <<'PY' || fail "cannot make tables"
import sys, numpy as np
t = sys.argv[1]
lo = 2 + 20 * np.arange(30); hi = lo + 19; le = 0.5 * (lo + hi)
def D(l):  # ln D exactly cubic: the estimator holds it (docs/peak.md)
    x = l - 236.2
    return np.exp(8.6 - x * x / 20000 - 1.5e-7 * x ** 3)
d = np.array([D(np.arange(a, b + 1.0)).mean() for a, b in zip(lo, hi)])
c = 2 * np.pi * d / (le * (le + 1))
def write(name, meta):
    with open(t + "/" + name, "w") as f:
        f.write(meta)
        f.write("l_min,l_max,l_eff,c_band_uK2,d_band_uK2,d_sigma_uK2\n")
        for row in zip(lo, hi, le, c, d):
            f.write("%d,%d,%r,%r,%r,40\n" % row)
write("fit.csv", "")
write("keys.csv", "# PK_FOUND = 1 / peak found\n# PK_MODEL = 'logcubic-gp' / model\n"
      "# PK_L = 236.2 / first peak multipole\n# PK_LERR = 1.5 / error\n# PK_HW = 100 / half width\n")
write("nopeak.csv", "# PK_FOUND = 0 / none\n# PK_MODEL = 'logcubic-gp' / model\n"
      "# PK_WHY = 'too noisy' / reason\n")
write("old.csv", "# PK_FOUND = 1 / peak found\n# PK_MODEL = 'parabola' / model\n"
      "# PK_L = 236.2 / first peak multipole\n# PK_LERR = 1.5 / error\n")
PY
"$CLEF_BIN" geometry --samples 300 --json "$T/keys.json" "$T/keys.csv" > "$T/keys.out" \
    || fail "geometry on keys.csv exit $?: $(cat "$T/keys.out")"
grep -q "236.20 +- 1.50 (recorded in" "$T/keys.out" || fail "keys summary: $(cat "$T/keys.out")"
"$CLEF_PYTHON" -c "
import json, sys
j = json.load(open(sys.argv[1]))
assert j['l_peak'] == 236.2 and j['l_peak_err'] == 1.5 and j['classification'] == 'open'
assert j['table'].endswith('keys.csv')
f = j['forward_model']
assert f['used'] is True and f['peak_settings']['half_width'] == 100 and abs(f['offset_flat']) < 1, f
" "$T/keys.json" || fail "keys JSON"
"$CLEF_BIN" geometry --samples 300 "$T/fit.csv" > "$T/fit.out" || fail "geometry on fit.csv exit $?"
grep -q "l_peak  *236.20 +- .* (fitted in" "$T/fit.out" || fail "fit summary: $(cat "$T/fit.out")"
"$CLEF_BIN" geometry "$T/nopeak.csv" > /dev/null 2>"$T/err.txt"
[ $? -eq 3 ] || fail "table without peak: expected exit 3"
grep -q "too noisy" "$T/err.txt" || fail "no-peak message: $(cat "$T/err.txt")"
"$CLEF_BIN" geometry "$T/old.csv" > /dev/null 2>"$T/err.txt"
[ $? -eq 3 ] || fail "a peak recorded by another estimator: expected exit 3"
grep -q "refit" "$T/err.txt" || fail "old-estimator message: $(cat "$T/err.txt")"

# --- errors: nothing written -----------------------------------------------
"$CLEF_BIN" geometry --peak-l 220 > /dev/null 2>&1
[ $? -eq 2 ] || fail "missing --peak-l-err: expected exit 2"
"$CLEF_BIN" geometry --peak-l 220 --peak-l-err 1 "$T/keys.csv" > /dev/null 2>&1
[ $? -eq 2 ] || fail "both forms: expected exit 2"
"$CLEF_BIN" geometry --peak-l 220 --peak-l-err -1 --json "$T/bad.json" > /dev/null 2>&1
[ $? -eq 3 ] || fail "negative error: expected exit 3"
[ -e "$T/bad.json" ] && fail "bad.json written on error"
"$CLEF_BIN" geometry --peak-l 60 --peak-l-err 1 --json "$T/far.json" > /dev/null 2>"$T/err.txt"
[ $? -eq 6 ] || fail "out-of-reach peak: expected exit 6"
[ -e "$T/far.json" ] && fail "far.json written on error"
grep -q "out of reach" "$T/err.txt" || fail "message: $(cat "$T/err.txt")"
"$CLEF_BIN" geometry "$T/absent.csv" > /dev/null 2>&1
[ $? -eq 4 ] || fail "missing table: expected exit 4"
"$CLEF_BIN" geometry --help | grep -q -- "--h-err" || fail "geometry --help"
exit 0

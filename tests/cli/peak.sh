#!/bin/sh
# clef peak: result and JSON on tables with a known peak, --require, and the
# documented exit codes for bad input (docs/peak.md, docs/exit-codes.md).
set -u
T="$CLEF_TEST_TMP/peak-cli"
mkdir -p "$T" || exit 1
fail() { echo "FAIL: $*"; exit 1; }

# A peak whose ln D is exactly cubic, ln D = 8.6 - d^2 / 20000 - 1.5e-7 d^3,
# d = l - 231.7, averaged over 20-wide bins (clef's CSV layout): the model
# holds it, so the fitted maximum is exactly 231.7 (no noise).
"$CLEF_PYTHON" - "$T" <<'PY' || fail "cannot make the test tables"
import sys, numpy as np
t = sys.argv[1]
lo = 2 + 20 * np.arange(30); hi = lo + 19; le = 0.5 * (lo + hi)
def D(l):
    x = l - 231.7
    return np.exp(8.6 - x * x / 20000 - 1.5e-7 * x ** 3)
d = np.array([D(np.arange(a, b + 1.0)).mean() for a, b in zip(lo, hi)])
c = 2 * np.pi * d / (le * (le + 1))
with open(t + "/para.csv", "w") as f:
    f.write("# NSIDE = 256 / resolution\nl_min,l_max,l_eff,c_band_uK2,d_band_uK2,d_sigma_uK2\n")
    for row in zip(lo, hi, le, c, d):
        f.write("%d,%d,%r,%r,%r,40\n" % row)
rho = 0.3 ** np.abs(np.subtract.outer(np.arange(30), np.arange(30)))
np.savetxt(t + "/para_cov.csv", 1600 * rho, delimiter=",")
with open(t + "/rising.txt", "w") as f:
    for l in range(100, 420, 20):
        f.write("%d %g 30\n" % (l, 1000 + 10 * l))
# The same parabola as a FITS table written by astropy, not by clef.
from astropy.io import fits
cols = [fits.Column(name=n, format=f, array=a) for n, f, a in
        (("LMIN", "J", lo), ("LMAX", "J", hi), ("LEFF", "D", le), ("C_BAND", "D", c),
         ("D_BAND", "D", d), ("D_SIGMA", "D", np.full(30, 40.0)))]
fits.HDUList([fits.PrimaryHDU(), fits.BinTableHDU.from_columns(cols, name="BANDPOWER")]).writeto(t + "/para.fits", overwrite=True)
PY

check_json() { # file, python expression over the parsed object j
    "$CLEF_PYTHON" -c "import json, sys; j = json.load(open(sys.argv[1])); sys.exit(0 if ($2) else 1)" "$1" \
        || fail "JSON check '$2' on $1: $(cat "$1")"
}

"$CLEF_BIN" peak --json "$T/para.json" "$T/para.csv" > "$T/out.txt" || fail "peak on para.csv exit $?"
grep -q "l_peak  *231.70" "$T/out.txt" || fail "printed l_peak: $(cat "$T/out.txt")"
check_json "$T/para.json" "j['found'] is True and abs(j['l_peak'] - 231.7) < 1e-6 and j['model'] == 'logcubic-gp' and j['covariance'] == 'diagonal'"
check_json "$T/para.json" "abs(j['angular_scale_deg'] - 180 / j['l_peak']) < 1e-12 and j['dof'] == j['bins_used'] - 4 and j['l_peak_err'] > 0"
check_json "$T/para.json" "abs(j['l_peak_err'] ** 2 - j['l_peak_err_stat'] ** 2 - j['l_peak_err_shape'] ** 2) < 1e-9 * j['l_peak_err'] ** 2"
check_json "$T/para.json" "j['settings']['half_width'] == 120 and j['settings']['windows'] == 'top-hat' and j['settings']['l_min'] == 100"

"$CLEF_BIN" peak --quiet --cov "$T/para_cov.csv" --json "$T/g.json" "$T/para.csv" > /dev/null \
    || fail "peak with --cov exit $?"
check_json "$T/g.json" "j['found'] and j['covariance'] == 'full' and abs(j['l_peak'] - 231.7) < 1e-6"
# By default the first-order error alone; --error-draws 200: refitted draws
# (docs/peak.md, step 11), close to it on this nearly linear fit.
check_json "$T/g.json" "j['l_peak_err_stat'] == j['l_peak_err_first_order'] and j['settings']['error_draws'] == 0 and 'error_draws_found' not in j"
"$CLEF_BIN" peak --quiet --error-draws 200 --cov "$T/para_cov.csv" --json "$T/g2.json" "$T/para.csv" \
    > /dev/null || fail "peak --error-draws 200 exit $?"
check_json "$T/g2.json" "j['settings']['error_draws'] == 200 and j['error_draws_found'] >= 180 and 0.8 < j['l_peak_err_stat'] / j['l_peak_err_first_order'] < 1.25 and j['l_peak'] == $(sed -n 's/.*"l_peak":\([^,]*\),.*/\1/p' "$T/g.json" | head -1)"

# --output: the table with the result as PK_* keywords; read back by clef
# peak (same numbers) and refused when it names the input.
"$CLEF_BIN" peak --half-width 100 --cov "$T/para_cov.csv" --output "$T/with.fits" "$T/para.csv" \
    > "$T/w1.txt" || fail "--output exit $?"
"$CLEF_PYTHON" -c "
import sys
from astropy.io import fits
h = fits.open(sys.argv[1])[1].header
assert h['PK_FOUND'] == 1 and abs(h['PK_L'] - 231.7) < 1e-6 and h['PK_HW'] == 100 and h['PK_MODEL'] == 'logcubic-gp', h
" "$T/with.fits" || fail "PK_* keywords in the --output table (astropy)"
"$CLEF_BIN" peak --half-width 100 "$T/with.fits" > "$T/w2.txt" || fail "peak on its own output exit $?"
sed 1d "$T/w1.txt" > "$T/w1b.txt"; sed 1d "$T/w2.txt" > "$T/w2b.txt"
cmp -s "$T/w1b.txt" "$T/w2b.txt" || fail "peak on the written table differs: $(cat "$T/w1.txt" "$T/w2.txt")"
cp "$T/para.csv" "$T/keep.csv"
"$CLEF_BIN" peak --output "$T/para.csv" "$T/para.csv" > /dev/null 2> "$T/e.txt"
rc=$?; [ "$rc" -eq 3 ] || fail "--output naming the input: exit $rc, expected 3"
cmp -s "$T/para.csv" "$T/keep.csv" || fail "--output naming the input changed it"

"$CLEF_BIN" peak --json "$T/f.json" "$T/para.fits" > /dev/null || fail "peak on astropy FITS exit $?"
check_json "$T/f.json" "j['found'] and abs(j['l_peak'] - 231.7) < 1e-6"

# Monotonic spectrum: no peak; exit 0 and the reason, or 9 with --require.
"$CLEF_BIN" peak --json "$T/r.json" "$T/rising.txt" > "$T/out.txt" || fail "rising without --require exit $?"
grep -q "^no peak found: " "$T/out.txt" || fail "no-peak wording: $(cat "$T/out.txt")"
check_json "$T/r.json" "j['found'] is False and 'edge' in j['reason'] and 'l_peak' not in j"
"$CLEF_BIN" peak --require "$T/rising.txt" > /dev/null
rc=$?; [ "$rc" -eq 9 ] || fail "--require on a monotonic table: exit $rc, expected 9"
"$CLEF_BIN" peak --require "$T/para.csv" > /dev/null || fail "--require with a peak: exit $?"

# Documented exit codes for bad input.
expect() { # code, description, command...
    code=$1; what=$2; shift 2
    "$@" > "$T/o.txt" 2> "$T/e.txt"
    rc=$?
    [ "$rc" -eq "$code" ] || fail "$what: exit $rc, expected $code ($(cat "$T/e.txt"))"
}
expect 4 "missing table" "$CLEF_BIN" peak "$T/none.csv"
printf '100 3000 50\n140 4x00 50\n' > "$T/bad.txt"
expect 5 "bad number" "$CLEF_BIN" peak "$T/bad.txt"
grep -q "line 2 column 2" "$T/e.txt" || fail "bad-line message: $(cat "$T/e.txt")"
printf '100 3000\n140 4000\n180 3000\n' > "$T/noerr.txt"
expect 3 "table without errors" "$CLEF_BIN" peak "$T/noerr.txt"
expect 3 "no bin in the window" "$CLEF_BIN" peak --l-min 1000 --l-max 2000 "$T/para.csv"
printf '1,0\n0,1\n' > "$T/badcov.csv"
expect 5 "covariance of the wrong size" "$CLEF_BIN" peak --cov "$T/badcov.csv" "$T/para.csv"
expect 2 "the removed --model option" "$CLEF_BIN" peak --model parabola "$T/para.csv"
expect 2 "half width not positive" "$CLEF_BIN" peak --half-width 0 "$T/para.csv"
expect 2 "negative error draws" "$CLEF_BIN" peak --error-draws -1 "$T/para.csv"
expect 2 "error draws not a number" "$CLEF_BIN" peak --error-draws many "$T/para.csv"
expect 2 "window reversed" "$CLEF_BIN" peak --l-min 400 --l-max 100 "$T/para.csv"
expect 2 "bad number option" "$CLEF_BIN" peak --half-width x "$T/para.csv"
expect 2 "no table" "$CLEF_BIN" peak
expect 2 "two tables" "$CLEF_BIN" peak "$T/para.csv" "$T/para.csv"
expect 4 "JSON into a missing folder" "$CLEF_BIN" peak --json "$T/no/dir/x.json" "$T/para.csv"
[ ! -e "$T/no/dir/x.json" ] || fail "partial JSON left behind"
"$CLEF_BIN" peak --help | grep -q -- "--half-width" || fail "--help"
echo "peak.sh: all checks passed"

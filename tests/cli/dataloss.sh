#!/bin/sh
# No lost data, clean batch behaviour (issue 11, item 5): every output that
# resolves to an input is refused with exit 3 and the input left intact
# (same name, symbolic link, hard link); a symbolic link is written
# through to its target and kept; '-' and /dev/stdout write to standard
# output and never create or replace a file; output folders are checked
# before the computation; the warnings a run deserves (same map twice,
# unknown unit, silent caps) reach stderr and the JSON "warnings"; a file
# without ORDERING needs --ordering; --second-mask runs report both masks; the
# tables clef model writes are read back.  Exit codes: docs/exit-codes.md.
set -u
: "${CLEF_BIN:?}" "${CLEF_PYTHON:?}" "${CLEF_TEST_TMP:?}"
T=$(mktemp -d "$CLEF_TEST_TMP/dataloss-XXXXXX")
cd "$T" || exit 1
C="$CLEF_BIN"
failures=0
fail() { echo "FAIL: $*"; failures=$((failures + 1)); }
sum() { cksum < "$1"; }

# run CODE WHAT COMMAND...: the command exits with CODE (output in o.txt, e.txt).
run() {
    code=$1; what=$2; shift 2
    "$@" > o.txt 2> e.txt
    rc=$?
    [ "$rc" -eq "$code" ] || fail "$what: exit $rc, expected $code ($(head -c 400 e.txt))"
}
# intact FILE SUM WHAT: FILE still has checksum SUM.
intact() { [ "$(sum "$1")" = "$2" ] || fail "$3: $1 was changed"; }
no_temporaries() {
    if ls -A | grep -q '\.clef-tmp\.'; then fail "$1: a temporary file was left: $(ls -A | grep '\.clef-tmp\.')"; fi
}

"$C" simulate --quiet --nside 32 --model --seed 2 --splits 2 --noise-depth 40 --output sky.fits \
    || fail "simulate"
"$C" mask --quiet --nside 32 --latitude-cut 15 --output mask.fits || fail "mask"
"$C" mask --quiet --nside 32 --latitude-cut 25 --output mask2.fits || fail "mask2"
"$C" model --quiet --lmax 200 --output model.txt || fail "model"
S1=sky_split1.fits; S2=sky_split2.fits
s1=$(sum $S1); sm=$(sum mask.fits); smodel=$(sum model.txt)

# 1. spectrum -o PREFIX where PREFIX.fits is the input map (the case of the
# issue), under its own name, a symbolic link and a hard link.
run 3 "spectrum -o onto the map" "$C" spectrum $S1 --mask mask.fits -o sky_split1
intact $S1 "$s1" "spectrum -o onto the map"
grep -q "is the input file" e.txt || fail "message: $(cat e.txt)"
ln -s $S1 viasym.fits; ln $S1 viahard.fits
run 3 "spectrum -o onto a symbolic link to the map" "$C" spectrum $S1 --mask mask.fits -o viasym
run 3 "spectrum -o onto a hard link of the map" "$C" spectrum $S1 --mask mask.fits -o viahard
intact $S1 "$s1" "spectrum -o onto links"
[ -L viasym.fits ] || fail "the symbolic link was replaced"
run 3 "spectrum --json onto the mask" "$C" spectrum $S1 --mask mask.fits -o out --json mask.fits
intact mask.fits "$sm" "spectrum --json onto the mask"
run 3 "spectrum --json onto its own FITS output" "$C" spectrum $S1 --mask mask.fits -o out \
    --json out.fits
[ ! -e out.fits ] || fail "a refused run wrote out.fits"
run 3 "spectrum -o onto the theory table" "$C" spectrum $S1 --mask mask.fits --covariance-model model.txt \
    -o model --format csv --json model.txt
intact model.txt "$smodel" "spectrum onto the theory table"
no_temporaries "refused spectrum runs"

# 2. Outputs checked before the computation: a missing folder, a folder.
run 4 "spectrum into a missing folder" "$C" spectrum $S1 --mask mask.fits -o no/such/dir/x
grep -q "no/such/dir" e.txt || fail "folder message: $(cat e.txt)"
mkdir adir.fits
run 4 "spectrum onto a folder" "$C" spectrum $S1 --mask mask.fits -o adir --format fits
[ -d adir.fits ] || fail "the folder was replaced"

# 3. A symbolic link as output is written through: the target gets the
# table, the link stays; a dangling link creates its target.
mkdir real
ln -s real/night.json link.json
ln -s real/later.json dangling.json
"$C" spectrum --quiet $S1 --mask mask.fits -o link --format json || fail "spectrum through a link"
"$C" spectrum --quiet $S1 --mask mask.fits -o dangling --format json \
    || fail "spectrum through a dangling link"
[ -L link.json ] && [ -L dangling.json ] || fail "an output link was replaced by a file"
"$CLEF_PYTHON" -c "
import json; [json.load(open(f)) for f in ('real/night.json', 'real/later.json')]" \
    || fail "the link targets were not written"

# 4. '-' and /dev/stdout: standard output, never a file named '-', never a
# replaced device link; the text summary moves to stderr.
"$C" spectrum $S1 --mask mask.fits --format json --json - -o dash > dash.out 2> dash.err \
    || fail "--json - exit $?"
[ ! -e ./- ] || fail "--json - wrote a file named '-'"
"$CLEF_PYTHON" -c "import json; json.load(open('dash.out'))" || fail "--json - is not JSON on stdout"
grep -q "auto-spectrum" dash.err || fail "the text summary did not move to stderr"
if [ -L /dev/stdout ]; then had_link=1; else had_link=0; fi
"$C" spectrum --quiet $S1 --mask mask.fits --format json --json /dev/stdout -o devout > dev.out \
    || fail "--json /dev/stdout exit $?"
"$CLEF_PYTHON" -c "import json; json.load(open('dev.out'))" || fail "--json /dev/stdout is not JSON"
if [ "$had_link" -eq 1 ] && [ ! -L /dev/stdout ]; then fail "/dev/stdout was replaced"; fi
"$C" model --lmax 50 --output - > model-dash.txt 2> model-dash.err || fail "model --output -"
[ ! -e ./- ] || fail "model --output - wrote a file named '-'"
head -c 200 model-dash.txt | grep -q "# CMB temperature power spectrum" \
    || fail "model --output - did not write the table to stdout"
grep -q "acoustic scale" model-dash.err || fail "model summary did not move to stderr"
"$C" inspect --json - $S1 > insp.json || fail "inspect --json -"
"$CLEF_PYTHON" -c "import json; j = json.load(open('insp.json')); assert j['nside'] == 32" \
    || fail "inspect --json - output"
"$C" mask --nside 8 --output - > mask8.fits || fail "mask --output -"
"$C" inspect --quiet mask8.fits > q.txt || fail "the mask written to stdout does not read back"
[ ! -s q.txt ] || fail "inspect --quiet printed: $(cat q.txt)"
"$C" plot map $S1 -o - > fig.png 2> /dev/null || fail "plot map -o -"
[ "$(head -c 4 fig.png | od -An -c | tr -d ' ')" = "211PNG" ] || fail "plot -o - is not a PNG"
run 2 "spectrum -o - (a prefix)" "$C" spectrum $S1 --mask mask.fits -o -
run 2 "simulate --splits 2 to stdout" "$C" simulate --nside 8 --model --splits 2 --output -

# 5. The other subcommands refuse to overwrite their inputs.
cp $S1 conv_in.fits; sc=$(sum conv_in.fits); ln conv_in.fits conv_hard.fits
run 3 "convert onto its input" "$C" convert conv_in.fits conv_in.fits
run 3 "convert onto a hard link of its input" "$C" convert conv_in.fits conv_hard.fits
intact conv_in.fits "$sc" "convert"
printf '# columns: l D_l\n' > dl.txt
"$CLEF_PYTHON" -c "
for l in range(2, 200): print(l, 1000.0)" >> dl.txt
sd=$(sum dl.txt)
run 3 "simulate onto its spectrum" "$C" simulate --nside 8 --cl dl.txt --output dl.txt
intact dl.txt "$sd" "simulate"
run 3 "simulate --alm-output onto its spectrum" "$C" simulate --nside 8 --cl dl.txt \
    --output fine.fits --alm-output dl.txt
[ ! -e fine.fits ] || fail "a refused simulate wrote its map"
run 3 "mask --output onto --from" "$C" mask --from mask.fits --output mask.fits
run 3 "mask --json onto --from" "$C" mask --from mask.fits --json mask.fits
intact mask.fits "$sm" "mask"
ln -s mask.fits figlink.png
run 3 "plot onto a link to its mask" "$C" plot map $S1 --mask mask.fits -o figlink.png
intact mask.fits "$sm" "plot"
"$C" spectrum --quiet $S1 --mask mask.fits -o bp --format fits --no-peak || fail "bp table"
sb=$(sum bp.fits)
run 3 "peak --json onto its table" "$C" peak bp.fits --json bp.fits
run 3 "geometry --json onto its table" "$C" geometry --json bp.fits bp.fits
intact bp.fits "$sb" "peak/geometry"
run 3 "inspect --json onto the map" "$C" inspect --json $S1 $S1
intact $S1 "$s1" "inspect"
no_temporaries "refused runs of the other subcommands"

# 6. The same file as both maps of a cross-spectrum: a warning (stderr and
# JSON), also through a link.
"$C" spectrum $S1 viasym.fits --mask mask.fits -o same --format json > /dev/null 2> same.err \
    || fail "cross of a file with itself exit $?"
grep -q "are the same file" same.err || fail "no same-file warning: $(cat same.err)"
"$CLEF_PYTHON" -c "
import json; j = json.load(open('same.json'))
assert any('same file' in w for w in j['warnings']), j['warnings']" || fail "same-file warning not in JSON"

# 7. Map units: an unknown TUNIT is refused (exit 3) unless --unit or
# --calibration states it; --unit K scales by 1e6 (D by 1e12).
"$CLEF_PYTHON" - <<'PY' || fail "writing unit test maps"
import numpy as np
from astropy.io import fits
with fits.open("sky_split1.fits") as h:
    v = np.asarray(h[1].data.field(0), dtype=np.float64).ravel()
def write(name, values, unit, ordering=True):
    col = fits.Column(name="T", format="D", unit=unit, array=values)
    t = fits.BinTableHDU.from_columns([col])
    hd = [("PIXTYPE", "HEALPIX"), ("NSIDE", 32), ("FIRSTPIX", 0), ("LASTPIX", values.size - 1),
          ("INDXSCHM", "IMPLICIT")]
    if ordering:
        hd.append(("ORDERING", "RING"))
    for k, x in hd:
        t.header[k] = x
    fits.HDUList([fits.PrimaryHDU(), t]).writeto(name, overwrite=True)
write("jy.fits", v, "Jy/sr")
write("kelvin.fits", v * 1e-6, "K")
write("noorder.fits", v, "uK", ordering=False)
PY
run 3 "unknown unit" "$C" spectrum jy.fits --mask mask.fits -o unit_bad
grep -q "Jy/sr" e.txt && grep -q -- "--unit" e.txt || fail "unit message: $(cat e.txt)"
[ ! -e unit_bad.fits ] || fail "a refused unit wrote output"
"$C" spectrum --quiet jy.fits --mask mask.fits --unit uK -o unit_uk --format json --no-peak \
    || fail "--unit uK exit $?"
"$C" spectrum --quiet kelvin.fits --mask mask.fits -o unit_k --format json --no-peak || fail "TUNIT K"
"$C" spectrum --quiet jy.fits --mask mask.fits --calibration 1e-6 --unit K -o x > /dev/null 2>&1 \
    && fail "--unit with --calibration accepted"
"$C" spectrum --quiet kelvin.fits --mask mask.fits --calibration 1e6 -o unit_cal --format json \
    --no-peak || fail "--calibration exit $?"
run 2 "--unit that is not a unit" "$C" spectrum jy.fits --mask mask.fits --unit furlong -o x
"$CLEF_PYTHON" - <<'PY' || fail "units do not give the same band powers"
import json
import numpy as np
d = [np.array(json.load(open(f))["bandpowers"]["d_uK2"]) for f in
     ("unit_uk.json", "unit_k.json", "unit_cal.json")]
assert np.allclose(d[1], d[0], rtol=1e-9) and np.allclose(d[2], d[0], rtol=1e-9), d
PY

# 8. A file without ORDERING: refused (exit 5) unless --ordering states it.
run 5 "no ORDERING" "$C" spectrum noorder.fits --mask mask.fits -o ord_bad
grep -q "ORDERING" e.txt || fail "ordering message: $(cat e.txt)"
run 0 "--ordering RING" "$C" spectrum --quiet noorder.fits --mask mask.fits --ordering RING \
    -o ord_ok --format json --no-peak
run 0 "plot --ordering" "$C" plot map --quiet noorder.fits --ordering RING -o ord.png
run 0 "mask --ordering" "$C" mask --quiet --from noorder.fits --ordering RING --output ord_mask.fits
run 2 "--ordering SPIRAL" "$C" spectrum noorder.fits --mask mask.fits --ordering SPIRAL -o x

# 9. --second-mask: both masks in the JSON summary and the FITS keywords.
"$C" spectrum --quiet $S1 $S2 --mask mask.fits --second-mask mask2.fits -o two --format fits,json \
    --no-peak || fail "--second-mask run exit $?"
"$CLEF_PYTHON" - <<'PY' || fail "--second-mask not reported"
import json, math
from astropy.io import fits
j = json.load(open("two.json"))
s = j["sky"]
# Latitude cuts: f_sky = 1 - sin(b) (common practice), to pixel accuracy.
assert abs(s["f_sky"] - (1 - math.sin(math.radians(15)))) < 0.03, s
assert abs(s["mask2"]["f_sky"] - (1 - math.sin(math.radians(25)))) < 0.03, s
with fits.open("two.fits") as h:
    hd = h["BANDPOWER"].header
    assert hd["MASK2"] == "mask2.fits"
    assert abs(hd["FSKY2"] - s["mask2"]["f_sky"]) < 1e-12 and hd["FSKY"] != hd["FSKY2"]
    for k in ("MASK2W2", "MASK2W4", "FSKYEFF2"):
        assert k in hd, k
PY

# 10. clef model's FITS table is read by --cl, --covariance-model and plot --model-curve.
"$C" model --quiet --lmax 200 --output model.fits || fail "model FITS"
run 0 "simulate --cl model.fits" "$C" simulate --quiet --nside 32 --cl model.fits --output fromfits.fits
run 0 "spectrum --covariance-model model.fits" "$C" spectrum --quiet $S1 --mask mask.fits \
    --covariance-model model.fits -o th --format fits --no-peak
run 0 "plot --model-curve model.fits" "$C" plot spectrum --quiet th.fits --model-curve model.fits -o th.png
"$C" simulate --quiet --nside 32 --cl model.txt --output fromtext.fits || fail "simulate --cl text"
"$CLEF_PYTHON" - <<'PY' || fail "the FITS and text model tables give different skies"
import numpy as np
from astropy.io import fits
a, b = (np.asarray(fits.open(f)[1].data.field(0), dtype=float).ravel()
        for f in ("fromfits.fits", "fromtext.fits"))
# The text table keeps 11 significant digits (docs/formats-spectrum.md).
assert np.allclose(a, b, rtol=1e-8, atol=1e-8 * np.abs(b).max()), abs(a - b).max()
PY

# 11. plot map --column applies to the map only, not to the mask.
"$CLEF_PYTHON" - <<'PY' || fail "two-column map"
import numpy as np
from astropy.io import fits
v = np.arange(12 * 32 * 32, dtype=float)
t = fits.BinTableHDU.from_columns([fits.Column(name="A", format="D", array=v),
                                   fits.Column(name="B", format="D", array=-v)])
for k, x in [("PIXTYPE", "HEALPIX"), ("ORDERING", "RING"), ("NSIDE", 32), ("FIRSTPIX", 0),
             ("LASTPIX", v.size - 1), ("INDXSCHM", "IMPLICIT")]:
    t.header[k] = x
fits.HDUList([fits.PrimaryHDU(), t]).writeto("two_columns.fits")
PY
run 0 "plot map --column B with a one-column mask" "$C" plot map --quiet two_columns.fits \
    --column B --mask mask.fits -o col.png

[ "$failures" -eq 0 ] || { echo "$failures failure(s)"; exit 1; }
echo "dataloss: all checks passed"

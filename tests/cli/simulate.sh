#!/bin/sh
# clef simulate end to end: the maps it writes are read by astropy with the
# right NSIDE, ORDERING and layout; numpy checks the noise level of the
# split difference (sky cancels, sigma = sqrt(2) sigma_pix) and the
# unobserved pixels of a hit map; same seed gives the same map for 1 and 2
# threads; bad options give their documented exit codes (src/cli/cli.h) and
# write nothing.
set -eu
: "${CLEF_BIN:?}" "${CLEF_PYTHON:?}" "${CLEF_TEST_TMP:?}"
T=$(mktemp -d "$CLEF_TEST_TMP/simulate-XXXXXX")
cd "$T"
failures=0
fail() { echo "FAIL: $*"; failures=$((failures + 1)); }

# 1. Model sky, beam, pixel window, noise, two splits, float32, gzip, a_lm.
"$CLEF_BIN" simulate --nside 32 --model --seed 5 --beam-fwhm 120 \
    --noise-depth 50 --splits 2 --float32 --coordsys G --output sky.fits.gz \
    --alm-output alm.fits --threads 2 --quiet || fail "simulate with splits"
for f in sky_split1.fits.gz sky_split2.fits.gz alm.fits; do
    [ -f "$f" ] || fail "missing output $f"
done
[ -e sky.fits.gz ] && fail "with --splits 2 no unsplit file is written"
"$CLEF_PYTHON" - <<'PY' || fail "astropy/numpy checks of the split maps"
import gzip
import numpy as np
from astropy.io import fits

assert open("sky_split1.fits.gz", "rb").read(2) == b"\x1f\x8b", "not gzip"
maps = []
for name in ("sky_split1.fits.gz", "sky_split2.fits.gz"):
    with fits.open(name) as h:
        hd = h[1].header
        assert hd["PIXTYPE"] == "HEALPIX", hd["PIXTYPE"]
        assert hd["ORDERING"] == "RING", hd["ORDERING"]
        assert hd["NSIDE"] == 32, hd["NSIDE"]
        assert hd["COORDSYS"] == "G", hd["COORDSYS"]
        assert h[1].columns[0].format.endswith("E"), h[1].columns[0].format
        v = np.asarray(h[1].data.field(0), dtype=np.float64).ravel()
        assert v.size == 12 * 32 * 32, v.size
        maps.append(v)
d = maps[0] - maps[1]
npix = d.size
arcmin2 = 4 * np.pi / npix * (180 * 60 / np.pi) ** 2
sigma = 50.0 / np.sqrt(arcmin2)
# Difference of two independent noise maps: std sqrt(2) sigma_pix; the
# relative standard error of a sample std is 1/sqrt(2 n).
s = d.std()
assert abs(s / (np.sqrt(2) * sigma) - 1) < 4 / np.sqrt(2 * npix), (s, sigma)
# The sky is common: the sum has far more power than the difference.
assert (maps[0] + maps[1]).std() > 2 * s
with fits.open("alm.fits") as h:
    assert h[1].header["LMAX"] == 95, h[1].header["LMAX"]
    assert len(h[1].data) == 96 * 97 // 2
PY

# 1b. Default to default: clef simulate applies the pixel window as a real
# map has it, and clef spectrum corrects for it, so the round trip recovers
# the input model; without the window (--no-pixel-window, the former
# default) the corrected band powers come out high at high l, by one over
# the pixel window squared (about 1/0.6 at l = 2 nside: common practice,
# from memory).
"$CLEF_BIN" model --quiet --lmax 191 --output model.txt || fail "model"
"$CLEF_BIN" mask --quiet --nside 64 --output full.fits || fail "full-sky mask"
"$CLEF_BIN" simulate --quiet --nside 64 --model --seed 21 --output pw.fits || fail "simulate default"
"$CLEF_BIN" simulate --quiet --nside 64 --model --seed 21 --no-pixel-window --output nopw.fits \
    || fail "simulate --no-pixel-window"
for m in pw nopw; do
    "$CLEF_BIN" spectrum --quiet $m.fits --mask full.fits --bin-width 20 --lmax 180 --no-peak \
        --format csv --no-cache -o sp_$m || fail "spectrum of $m.fits"
done
"$CLEF_PYTHON" - <<'PY' || fail "simulate/spectrum round trip with default pixel-window settings"
import csv
import numpy as np
m = np.loadtxt("model.txt")            # l, C_l, D_l (uK^2)
dl = dict(zip(m[:, 0].astype(int), m[:, 2]))
def table(name):
    rows = list(csv.DictReader(l for l in open(name) if not l.startswith("#")))
    return [(int(r["l_min"]), int(r["l_max"]), float(r["d_band_uK2"]), float(r["d_sigma_uK2"]))
            for r in rows]
def ratios(name):
    out = []
    for lo, hi, d, e in table(name):
        truth = np.mean([dl[l] for l in range(lo, hi + 1)])
        out.append((lo, d / truth, (d - truth) / e))
    return out
pw = ratios("sp_pw.csv"); nopw = ratios("sp_nopw.csv")
# Every bin within 4 quoted sigma of the model (cosmic variance only).
assert all(abs(z) < 4 for _, _, z in pw), pw
high = [r for lo, r, _ in pw if lo >= 120]
assert abs(np.mean(high) - 1) < 0.08, high
wrong = [r for lo, r, _ in nopw if lo >= 120]
assert np.mean(wrong) > 1.3, wrong     # the mismatch the default removes
PY

# 2. Same seed, same map, whatever the thread count.
"$CLEF_BIN" simulate --nside 32 --model --seed 9 --noise-depth 20 --output t1.fits --threads 1 --quiet || fail "threads 1"
"$CLEF_BIN" simulate --nside 32 --model --seed 9 --noise-depth 20 --output t2.fits --threads 2 --quiet || fail "threads 2"
"$CLEF_BIN" simulate --nside 32 --model --seed 10 --noise-depth 20 --output t3.fits --quiet || fail "seed 10"
"$CLEF_PYTHON" - <<'PY' || fail "same seed must give the same map, another seed another map"
import numpy as np
from astropy.io import fits
a, b, c = (fits.getdata(n, 1).field(0).ravel() for n in ("t1.fits", "t2.fits", "t3.fits"))
assert np.array_equal(a, b)
assert not np.array_equal(a, c)
PY

# 3. A user spectrum (D_l text file) and a hit map with unobserved pixels.
"$CLEF_PYTHON" - <<'PY'
import numpy as np
from astropy.io import fits
l = np.arange(2, 200)
np.savetxt("dl.txt", np.column_stack([l, 1000.0 * np.ones_like(l)]), fmt="%d %.6f",
           header="columns: l D_l")
nside = 32
npix = 12 * nside * nside
hits = np.ones(npix)
hits[: npix // 4] = 0
hits[npix // 2:] = 4
h = fits.BinTableHDU.from_columns([fits.Column(name="HITS", format="D", array=hits)])
for k, v in [("PIXTYPE", "HEALPIX"), ("ORDERING", "RING"), ("NSIDE", nside),
             ("INDXSCHM", "IMPLICIT"), ("COORDSYS", "E")]:
    h.header[k] = v
fits.HDUList([fits.PrimaryHDU(), h]).writeto("hits.fits")
h.header["NSIDE"] = 16
fits.HDUList([fits.PrimaryHDU(), fits.BinTableHDU.from_columns(
    [fits.Column(name="HITS", format="D", array=hits[:3072])], header=h.header)]).writeto("hits16.fits")
PY
"$CLEF_BIN" simulate --nside 32 --cl dl.txt --hits hits.fits --noise-depth 100 --output h.fits --quiet \
    || fail "simulate with --cl and --hits"
"$CLEF_PYTHON" - <<'PY' || fail "hit-map simulation: unobserved pixels missing, coordsys from the hit map"
import numpy as np
from astropy.io import fits
with fits.open("h.fits") as h:
    v = h[1].data.field(0).ravel()
    assert h[1].header["COORDSYS"] == "E"
npix = v.size
bad = np.abs(v + 1.6375e30) < 1e-5 * 1.6375e30
assert bad[: npix // 4].all() and not bad[npix // 4:].any()
PY

# 4. Bad options: exit code and no output.
expect() {
    code=$1; shift
    rm -f out.fits out_split1.fits out_split2.fits
    set +e
    "$CLEF_BIN" simulate "$@" >/dev/null 2>err.txt
    rc=$?
    set -e
    [ "$rc" -eq "$code" ] || fail "simulate $* exited $rc, expected $code: $(cat err.txt)"
    for f in out.fits out_split1.fits out_split2.fits; do
        [ -e "$f" ] && fail "simulate $* left $f"
    done
    ls -a | grep -q '\.clef-tmp\.' && fail "simulate $* left a temporary file"
    return 0
}
expect 2 --model --output out.fits                                   # no --nside
expect 2 --nside 3 --model --output out.fits                         # not a power of two
expect 2 --nside 16 --lmax 1 --model --output out.fits               # lmax too small
expect 2 --nside 16 --lmax 65 --model --output out.fits              # lmax > 4 nside
expect 2 --nside 16 --output out.fits                                # no spectrum
expect 2 --nside 16 --model --cl dl.txt --output out.fits            # two spectra
expect 2 --nside 16 --model                                          # no --output
expect 2 --nside 16 --model --splits 3 --output out.fits
expect 2 --nside 16 --model --hits hits.fits --output out.fits       # hits without depth
expect 2 --nside 16 --cl dl.txt --omega-b 0.03 --output out.fits     # parameters need --model
expect 2 --nside 16 --model --coordsys Q --output out.fits
expect 2 --nside 16 --model --seed -4 --output out.fits
expect 2 --nside 16 --model --beam-fwhm -1 --output out.fits
expect 2 --nside 16 --model --beam-fwhm 5 --beam-table dl.txt --output out.fits
expect 2 --nside 16 --model --noise-depth abc --output out.fits
expect 2 --nside 16 --model --no-such-option --output out.fits
expect 2 --nside 16 --model --pixel-window --output out.fits       # now the default: no option
expect 2 --nside 16 --model --beam-file dl.txt --output out.fits   # renamed --beam-table
expect 2 --nside 16 --model --output out.fits extra-argument
expect 3 --nside 16 --model --omega-b -0.5 --output out.fits        # unphysical model
expect 3 --nside 16 --model --hits hits.fits --noise-depth 5 --output out.fits  # nside mismatch
expect 3 --nside 32 --model --hits hits16.fits --noise-depth 5 --output out.fits
printf '0 1\n1 0.9\n' > short_beam.txt
expect 3 --nside 16 --model --beam-table short_beam.txt --output out.fits  # beam stops early
expect 4 --nside 16 --cl no-such-file.txt --output out.fits
expect 4 --nside 16 --model --beam-table no-such-beam.txt --output out.fits
expect 4 --nside 16 --model --hits no-such-hits.fits --noise-depth 5 --output out.fits
expect 4 --nside 16 --model --output no-such-dir/out.fits
expect 4 --nside 16 --model --splits 2 --output out.fits --alm-output no-such-dir/alm.fits
printf '# columns: l C_l\n2 1\n3 x\n' > bad_cl.txt
expect 5 --nside 16 --cl bad_cl.txt --output out.fits
printf '0 1\n1 x\n' > bad_beam.txt
expect 5 --nside 16 --model --beam-table bad_beam.txt --output out.fits
"$CLEF_BIN" simulate --help | grep -q -- '--noise-depth' || fail "--help lacks --noise-depth"

[ "$failures" -eq 0 ] || { echo "$failures failure(s)"; exit 1; }
echo "simulate: all checks passed"

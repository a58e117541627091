"""clef.spectrum against `clef spectrum` on the same files: identical band
powers, errors, covariance, windows, peak and summary (to 1e-12), for
several option sets; and the argument checks."""
import json

import numpy as np
import pytest
from astropy.io import fits

import clef
from conftest import run_cli

# (CLI options, the same as keyword arguments)
CASES = [
    ([], {}),
    (["--bin-width", "30", "--no-pixel-window", "--keep-multipoles", "--no-peak"],
     dict(bin_width=30, pixel_window=False, keep_multipoles=True, peak=False)),
    (["--log-bins", "8", "--beam-fwhm", "30", "--iterations", "2"],
     dict(log_bins=8, beam_fwhm=30.0, iterations=2)),
    (["--lmax", "120", "--bin-width", "25", "--beam-fwhm", "30", "--peak-l-min", "80",
      "--peak-half-width", "90"],
     dict(lmax=120, bin_width=25, beam_fwhm=30.0, peak_l_min=80.0, peak_half_width=90.0)),
]


def cli_run(sky, tmp_path, maps, extra):
    out = tmp_path / "run"
    run_cli("spectrum", *maps, "--mask", sky / "mask.fits", "--no-cache", "--quiet",
            "--output", out, *extra)
    j = json.load(open(f"{out}.json"))
    with fits.open(f"{out}.fits") as h:
        cov = np.array(h["BANDCOV"].data, dtype=np.float64)
        win = np.array(h["BANDWIN"].data, dtype=np.float64) if "BANDWIN" in h else None
    return j, cov, win


def close(a, b):
    a, b = np.asarray(a, dtype=np.float64), np.asarray(b, dtype=np.float64)
    assert a.shape == b.shape
    assert np.all(np.abs(a - b) <= 1e-12 * np.maximum(np.abs(b), np.max(np.abs(b)) * 1e-3)), \
        np.max(np.abs(a - b))


@pytest.mark.parametrize("cross", [True, False])
@pytest.mark.parametrize("case", range(len(CASES)))
def test_same_as_cli(sky, tmp_path, cross, case):
    extra, kw = CASES[case]
    files = [sky / "sky_split1.fits"] + ([sky / "sky_split2.fits"] if cross else [])
    j, cov, win = cli_run(sky, tmp_path, files, extra)
    m1, meta1 = clef.read_map(files[0])
    mask, _ = clef.read_map(sky / "mask.fits")
    m2 = clef.read_map(files[1])[0] if cross else None
    r = clef.spectrum(m1, mask, m2, unit=meta1["unit"], coordsys="G", mask_coordsys="G",
                      cache=False, **kw)
    b = j["bandpowers"]
    assert list(r["l_lo"]) == b["l_min"] and list(r["l_hi"]) == b["l_max"]
    close(r["l_eff"], b["l_eff"])
    close(r["dl"], b["d_uK2"])
    close(r["dl_err"], b["d_err_uK2"])
    close(r["cl"], b["c_uK2"])
    close(r["cov"], cov)
    if win is not None:
        close(r["windows"], win)
    s = r["summary"]
    assert s["spectrum"] == j["spectrum"] and s["nside"] == j["sky"]["nside"]
    for k in ("lmax", "lmax_coupled", "lmax_mask", "nbins", "hidden_bins"):
        assert s[k] == j["options"][k.replace("hidden_bins", "hidden_bins")], k
    for k in ("f_sky", "w2", "w4", "f_sky_eff"):
        close(s[k], j["sky"][k])
    close(s["rcond"], j["coupling"]["rcond"])
    close(s["removed_multipoles_uK"], j["sky"]["removed_multipoles_uK"])
    if "peak" in j:
        p, q = r["peak"], j["peak"]
        assert p["found"] == q["found"]
        if q["found"]:
            for a, c in (("l_peak", "l_peak"), ("l_peak_err", "l_peak_err"),
                         ("d_peak", "d_peak_uK2"), ("chi2", "chi2"),
                         ("theta_deg", "angular_scale_deg")):
                close(p[a], q[c])
    else:
        assert r["peak"] is None


def test_mask2_and_bins_array(sky, tmp_path):
    run_cli("mask", "--quiet", "--nside", 64, "--latitude-cut", 20, "--taper", "c1",
            "--taper-width", 4, "--coordsys", "G", "--output", tmp_path / "mask2.fits")
    edges = tmp_path / "bins.txt"
    edges.write_text("2 30\n31 70\n71 110\n111 150\n151 190\n")
    files = [sky / "sky_split1.fits", sky / "sky_split2.fits"]
    j, cov, _ = cli_run(sky, tmp_path, files, ["--second-mask", str(tmp_path / "mask2.fits"),
                                               "--bins", str(edges)])
    m1, meta = clef.read_map(files[0])
    m2, _ = clef.read_map(files[1])
    mask, _ = clef.read_map(sky / "mask.fits")
    mask2, _ = clef.read_map(tmp_path / "mask2.fits")
    for bins in (edges, np.array([[2, 30], [31, 70], [71, 110], [111, 150], [151, 190]])):
        r = clef.spectrum(m1, mask, m2, mask2, unit=meta["unit"], bins=bins, cache=False)
        close(r["dl"], j["bandpowers"]["d_uK2"])
        close(r["cov"], cov)


def test_missing_pixels_as_nan(sky, tmp_path):
    # A map with missing pixels: NaN in Python is the file's bad value for the CLI.
    m, meta = clef.read_map(sky / "sky_split1.fits")
    m[1000:1400] = np.nan
    clef.write_map(tmp_path / "holes.fits", m, unit="uK", coordsys="G")
    j, _, _ = cli_run(sky, tmp_path, [tmp_path / "holes.fits"], ["--no-peak"])
    mask, _ = clef.read_map(sky / "mask.fits")
    r = clef.spectrum(m, mask, unit="uK", peak=False, cache=False)
    close(r["dl"], j["bandpowers"]["d_uK2"])
    assert np.isnan(m[1000])  # the caller's array is not changed


def test_bad_arguments(sky):
    m, _ = clef.read_map(sky / "sky_split1.fits")
    mask, _ = clef.read_map(sky / "mask.fits")
    with pytest.raises(ValueError, match="choose one of bins, log_bins and bin_width"):
        clef.spectrum(m, mask, bin_width=20, log_bins=5)
    with pytest.raises(ValueError, match="iterations must be in 0..20"):
        clef.spectrum(m, mask, iterations=21)
    with pytest.raises(ValueError, match="lmax must be at least 2"):
        clef.spectrum(m, mask, lmax=1)
    with pytest.raises(clef.InvalidArgumentError, match="lmax"):
        clef.spectrum(m, mask, lmax=500)
    bad = mask.copy()
    bad[0] = np.nan
    with pytest.raises(ValueError, match="mask1 holds NaN at RING pixel 0"):
        clef.spectrum(m, bad)
    bad[0] = 1.5
    with pytest.raises(clef.InvalidArgumentError, match="1.5"):
        clef.spectrum(m, bad)
    with pytest.raises(clef.InvalidArgumentError, match="nside"):
        clef.spectrum(m, clef.mask_full(32))
    with pytest.raises(TypeError, match="float64"):
        clef.spectrum(m.astype(np.float32), mask)
    with pytest.raises(TypeError):
        clef.spectrum(m, mask, bin_widht=20)
    with pytest.raises(ValueError, match="beam must cover"):
        clef.spectrum(m, mask, beam=np.ones(2))
    with pytest.raises(ValueError, match="non-finite"):
        clef.spectrum(m, mask, noise_cl=np.full(200, np.nan))
    with pytest.raises(clef.FileError, match="nope.txt"):
        clef.spectrum(m, mask, bins="/nonexistent/nope.txt")

"""Every other wrapped function against the command line on the same
inputs: the analytic model (clef model), simulations with a seed (clef
simulate), masks (clef mask), the first peak (clef peak) and the curvature
posterior (clef geometry); identical numbers to 1e-12."""
import json

import numpy as np
import pytest
from astropy.io import fits

import clef
from conftest import run_cli


def close(a, b, rtol=1e-12):
    a, b = np.asarray(a, dtype=np.float64), np.asarray(b, dtype=np.float64)
    assert a.shape == b.shape
    scale = np.maximum(np.abs(b), np.max(np.abs(b)) * 1e-6)
    assert np.all(np.abs(a - b) <= rtol * scale), np.max(np.abs(a - b) / scale)


@pytest.mark.parametrize("params", [{}, dict(omega_k=-0.05, h=0.6, n_s=0.97)])
def test_model(tmp_path, params):
    opts = {"omega_k": "--omega-k", "h": "--h", "n_s": "--n-s"}
    args = [x for k, v in params.items() for x in (opts[k], str(v))]
    run_cli("model", "--quiet", "--lmax", 1200, "--output", tmp_path / "m.fits", *args)
    with fits.open(tmp_path / "m.fits") as h:
        want = np.array(h["SPECTRUM"].data["CL"], dtype=np.float64)
    got = clef.theory_cl(lmax=1200, **params)
    close(got[2:], want[2:])
    assert got[0] == 0 and got[1] == 0
    # read_cl reads the CLI's file back to the same numbers
    close(clef.read_cl(tmp_path / "m.fits")[2:], want[2:])
    l1, d1 = clef.theory_first_peak(**params)
    l = np.arange(1201)
    dl = l * (l + 1) * got / (2 * np.pi)
    assert abs(l1 - l[np.argmax(dl[50:600]) + 50]) < 2  # the maximum of the tabulated D_l
    acc = clef.cosmo_acoustic(**params)
    assert acc["l_a"] == pytest.approx(np.pi / acc["theta_star"], rel=1e-14)


def test_model_bad_parameters():
    with pytest.raises(TypeError, match="unknown cosmological parameter 'omega_x'"):
        clef.theory_cl(omega_x=1.0)
    with pytest.raises(clef.InvalidArgumentError, match="h"):
        clef.theory_cl(h=-1.0)
    with pytest.raises(ValueError, match="lmax"):
        clef.theory_cl(lmax=1)


def test_cosmology_numbers():
    # Flat LCDM distance: D_M = chi (cosmo.h); H(0) = 100 h.
    assert clef.hubble(0.0, h=0.7) == pytest.approx(70.0, rel=1e-12)
    assert clef.transverse_distance(1100.0) == pytest.approx(clef.comoving_distance(1100.0),
                                                             rel=1e-12)
    # Hu & Sugiyama 1996 fit gives z_* near 1090 for Planck-like parameters (common practice).
    assert 1080 < clef.zstar() < 1100


@pytest.mark.parametrize("extra,kw", [
    ([], {}),
    (["--beam-fwhm", "60", "--noise-depth", "40", "--splits", "2", "--seed", "77"],
     dict(beam_fwhm=60.0, noise_depth=40.0, splits=2, seed=77)),
    (["--no-pixel-window", "--lmax", "40", "--seed", "123456789012"],
     dict(pixel_window=False, lmax=40, seed=123456789012)),
])
def test_simulate(tmp_path, extra, kw):
    nside = 16
    lmax = kw.get("lmax", 3 * nside - 1)
    run_cli("model", "--quiet", "--lmax", 100, "--output", tmp_path / "cl.txt")
    run_cli("simulate", "--quiet", "--nside", nside, "--cl", tmp_path / "cl.txt",
            "--output", tmp_path / "s.fits", "--alm-output", tmp_path / "alm.fits", *extra)
    cl = clef.read_cl(tmp_path / "cl.txt")
    maps, alm = clef.simulate(nside, cl, return_alm=True, **kw)
    want_alm, l, m = clef.read_alm(tmp_path / "alm.fits")
    assert (l, m) == (lmax, lmax)
    assert np.array_equal(alm, want_alm)
    if kw.get("splits") == 2:
        for s in (1, 2):
            pix, _ = clef.read_map(tmp_path / f"s_split{s}.fits")
            close(maps[s - 1], pix)
        assert maps.shape == (2, 12 * nside ** 2)
    else:
        pix, _ = clef.read_map(tmp_path / "s.fits")
        close(maps, pix)
    # sim_alm draws the same a_lm (docs/simulation.md: one stream per m)
    assert np.array_equal(clef.sim_alm(cl[:lmax + 1], seed=kw.get("seed", 1)), want_alm)


def test_simulate_hits(tmp_path):
    nside = 8
    hits = np.ones(12 * nside ** 2)
    hits[:40] = 0
    hits[40:100] = 4
    clef.write_map(tmp_path / "hits.fits", hits)
    run_cli("model", "--quiet", "--lmax", 40, "--output", tmp_path / "cl.txt")
    run_cli("simulate", "--quiet", "--nside", nside, "--cl", tmp_path / "cl.txt", "--seed", 5,
            "--noise-depth", 100, "--hits", tmp_path / "hits.fits", "--output", tmp_path / "s.fits")
    pix, meta = clef.read_map(tmp_path / "s.fits")
    got = clef.simulate(nside, clef.read_cl(tmp_path / "cl.txt"), seed=5, noise_depth=100.0,
                        hits=hits)
    assert np.array_equal(np.isnan(got), ~meta["valid"]) and np.isnan(got[:40]).all()
    close(got[40:], pix[40:])


def test_simulate_bad_input():
    cl = clef.theory_cl(lmax=100)
    with pytest.raises(ValueError, match="cl has 11 values"):
        clef.simulate(16, cl[:11])
    with pytest.raises(ValueError, match="splits"):
        clef.simulate(16, cl, splits=3)
    with pytest.raises(ValueError, match="nside"):
        clef.simulate(12, cl)
    bad = cl.copy()
    bad[5] = np.nan
    with pytest.raises(ValueError, match="non-finite"):
        clef.simulate(16, bad)
    with pytest.raises(clef.InvalidArgumentError):
        clef.simulate(16, -cl)


@pytest.mark.parametrize("extra,kw", [
    (["--nside", "32", "--latitude-cut", "20"], dict(nside=32, latitude_cut=20)),
    (["--nside", "32", "--patch", "30,-40,25", "--taper", "c1", "--taper-width", "6"],
     dict(nside=32, patch=(30, -40, 25), taper="c1", taper_width=6)),
    (["--nside", "32", "--latitude-cut", "10", "--taper", "gauss", "--taper-width", "8",
      "--erode", "3"],
     dict(nside=32, latitude_cut=10, taper="gauss", taper_width=8, erode=3)),
])
def test_mask(tmp_path, extra, kw):
    holes = tmp_path / "holes.txt"
    holes.write_text("# lon lat radius\n10 50 120\n200 -60 300\n")
    run_cli("mask", "--quiet", *extra, "--holes", holes, "--json", tmp_path / "m.json",
            "--output", tmp_path / "m.fits")
    want, _ = clef.read_map(tmp_path / "m.fits")
    got = clef.build_mask(holes=holes, **kw)
    close(got, want)
    got2 = clef.build_mask(holes=[[10, 50, 120], [200, -60, 300]], **kw)
    close(got2, want)
    j = json.load(open(tmp_path / "m.json"))
    mo = clef.mask_moments(got)
    for k, q in (("fsky", "f_sky"), ("w2", "w2"), ("w4", "w4"), ("fsky_eff", "f_sky_eff")):
        close(mo[k], j[q])
    # moments by their definition (Hivon et al. 2002): means of w^i
    assert mo["w2"] == pytest.approx(np.mean(got ** 2), rel=1e-12)


def test_mask_bad_input(tmp_path):
    with pytest.raises(clef.InvalidArgumentError):
        clef.mask_full(3)
    m = clef.mask_full(8)
    with pytest.raises(clef.InvalidArgumentError):
        clef.mask_cut_latitude(m, 2.0)  # above pi/2
    with pytest.raises(ValueError, match="kind"):
        clef.mask_apodize(m, "c3", 0.1)
    with pytest.raises(clef.FileError, match="nope"):
        clef.build_mask(8, holes=tmp_path / "nope.txt")
    (tmp_path / "bad.txt").write_text("10 95 3\n")
    with pytest.raises(clef.FormatError, match="bad.txt"):
        clef.build_mask(8, holes=tmp_path / "bad.txt")
    with pytest.raises(ValueError, match="exactly one"):
        clef.build_mask()


@pytest.fixture(scope="module")
def model_table(tmp_path_factory):
    """A band-power table of the analytic model: bins of 20 multipoles,
    3% errors (text layout 'l_eff D err', docs/formats.md)."""
    d = tmp_path_factory.mktemp("peak")
    cl = clef.theory_cl(lmax=700)
    l = np.arange(701)
    D = l * (l + 1) * cl / (2 * np.pi)
    rows = [(np.arange(lo, lo + 20).mean(), D[lo:lo + 20].mean()) for lo in range(20, 680, 20)]
    with open(d / "bp.txt", "w") as f:
        for le, dv in rows:
            f.write(f"{le!r} {dv!r} {0.03 * dv!r}\n")
    return d / "bp.txt"


@pytest.mark.parametrize("extra,kw", [
    ([], {}),
    (["--l-min", "150", "--l-max", "350", "--half-width", "100", "--curv-sigma", "1"],
     dict(l_min=150.0, l_max=350.0, half_width=100.0, curv_sigma=1.0)),
    (["--error-draws", "0"], dict(error_draws=0)),
    (["--error-draws", "57"], dict(error_draws=57)),
])
def test_peak(tmp_path, model_table, extra, kw):
    run_cli("peak", "--quiet", model_table, "--json", tmp_path / "p.json", *extra)
    j = json.load(open(tmp_path / "p.json"))
    for table in (model_table, clef.read_bandpowers(model_table)):
        p = clef.peak_find(table, **kw)
        assert p["found"] and j["found"]
        for a, b in (("l_peak", "l_peak"), ("l_peak_err", "l_peak_err"), ("d_peak", "d_peak_uK2"),
                     ("d_peak_err", "d_peak_err_uK2"), ("chi2", "chi2"),
                     ("curv_signif", "curvature_signif"),
                     ("l_peak_err_first_order", "l_peak_err_first_order")):
            close(p[a], j[b])
        assert p["error_draws"] == j["settings"]["error_draws"]
        if p["error_draws"]:
            assert p["error_draws_found"] == j["error_draws_found"]
        assert p["dof"] == j["dof"] and p["nbins_used"] == j["bins_used"]
    # The model's own first peak is within the fit's error (docs/peak.md).
    assert abs(p["l_peak"] - clef.theory_first_peak()[0]) < 3 * p["l_peak_err"]


def test_peak_bad_input(model_table, tmp_path):
    with pytest.raises(ValueError, match="l_min"):
        clef.peak_find(model_table, l_min=400, l_max=100)
    with pytest.raises(clef.FileError):
        clef.peak_find(tmp_path / "missing.fits")
    t = clef.read_bandpowers(model_table)
    t["dl_err"][:] = 0.0  # zero errors: unusable input (peak.h)
    with pytest.raises(clef.InvalidArgumentError):
        clef.peak_find(t)
    with pytest.raises(ValueError, match="l_eff"):
        clef.peak_find({"dl": [1.0]})
    with pytest.raises(TypeError, match="band-power dict"):
        clef.peak_find(42)


@pytest.mark.parametrize("forward", [False, True])
def test_geometry(tmp_path, model_table, forward):
    p = clef.peak_find(model_table)
    if forward:
        run_cli("geometry", "--quiet", model_table, "--samples", 300, "--grid", 301,
                "--json", tmp_path / "g.json")
        r = clef.geometry_infer(p["l_peak"], p["l_peak_err"], nsamples=300, ngrid=301,
                                forward_table=model_table)
    else:
        run_cli("geometry", "--quiet", "--peak-l", repr(p["l_peak"]), "--peak-l-err",
                repr(p["l_peak_err"]), "--samples", 300, "--grid", 301, "--h", 0.7,
                "--json", tmp_path / "g.json")
        r = clef.geometry_infer(p["l_peak"], p["l_peak_err"], nsamples=300, ngrid=301, h=0.7)
    j = json.load(open(tmp_path / "g.json"))
    close(r["omega_k"], j["curve"]["omega_k"])
    close(r["posterior"], j["curve"]["posterior"], rtol=1e-10)
    for k in ("best", "lo68", "hi68", "lo95", "hi95", "mean", "sd"):
        close(r[k], j["omega_k"][k])
    assert r["classification"] == j["classification"] and r["forward"] == forward
    # The two-step form (clef_geometry_plan_create / _execute): the same
    # posterior as the one-call form, and as the CLI.
    kw = dict(forward_table=model_table) if forward else dict(h=0.7)
    plan = clef.GeometryPlan(nsamples=300, ngrid=301, **kw)
    q = plan.execute(p["l_peak"], p["l_peak_err"])
    close(q["posterior"], j["curve"]["posterior"], rtol=1e-10)
    for k in ("best", "lo68", "hi68", "lo95", "hi95", "mean", "sd"):
        close(q[k], j["omega_k"][k])
    assert q["classification"] == j["classification"] and q["forward"] == forward


def test_geometry_plan_bad_input():
    with pytest.raises(TypeError, match="keyword options only"):
        clef.GeometryPlan(l_peak=220.0)
    with pytest.raises(TypeError):
        clef.GeometryPlan(220.0)
    with pytest.raises(clef.InvalidArgumentError):
        clef.GeometryPlan(ngrid=1)
    plan = clef.GeometryPlan(nsamples=200, ngrid=201)
    with pytest.raises(clef.InvalidArgumentError):
        plan.execute(220.0, -1.0)
    with pytest.raises(TypeError):
        plan.execute(220.0)


def test_geometry_bad_input():
    with pytest.raises(clef.InvalidArgumentError):
        clef.geometry_infer(220.0, -1.0)
    with pytest.raises(TypeError):
        clef.geometry_infer(220.0)

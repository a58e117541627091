"""The polarization wrappers: clef.ShtSpin against spin-2 harmonics built
here from scipy.special.sph_harm by the spin-raising operator (direct sums
in numpy, l <= 20); clef.read_map_pol / write_map_pol against astropy and
the POLCCONV rules of map.h; clef.simulate_pol and clef.spectrum_pol
against `clef simulate --polarization` and `clef spectrum --polarization`
on the same inputs (identical numbers to 1e-12); bad arrays, keywords and
files.

Conventions checked (Zaldarriaga & Seljak 1997, PRD 55, 1830, as HEALPix
uses them; Newman & Penrose 1966 for eth):
    Q +- iU = sum_lm a_{+-2,lm} _{+-2}Y_lm,  a_{+-2,lm} = -(a_E,lm +- i a_B,lm),
    _{+-2}Y_lm = sqrt((l-2)!/(l+2)!) eth^2 Y_lm (eth-bar^2 for -2),
    eth f = -sin^s(d_theta + i/sin d_phi) sin^-s f  (spin s; eth-bar with -i).
"""
import json
import logging
import math

import numpy as np
import pytest
from astropy.io import fits
from scipy.special import sph_harm

import clef
from conftest import longest_pause, run_cli, timed_plan
from test_sht import ring_centres

SPECTRA = ("TT", "TE", "TB", "EE", "EB", "BB")


def close(a, b, rtol=1e-12):
    a, b = np.asarray(a, dtype=np.float64), np.asarray(b, dtype=np.float64)
    assert a.shape == b.shape, (a.shape, b.shape)
    scale = np.maximum(np.abs(b), np.max(np.abs(b)) * 1e-6)
    assert np.all(np.abs(a - b) <= rtol * scale), np.max(np.abs(a - b) / scale)


# ---- spin-2 harmonics, independent of clef ----------------------------------

def ylm(l, m, theta, phi):
    """Y_lm with the Condon-Shortley phase (scipy's sph_harm: azimuth first);
    zero for |m| > l."""
    if abs(m) > l:
        return np.zeros(theta.shape, dtype=np.complex128)
    return sph_harm(m, l, phi, theta)


def spin2_ylm(l, m, theta, phi, s):
    """_{s}Y_lm for s = +2 or -2 by the spin-raising (lowering) operator.

    With d_phi Y = i m Y, eth Y = -(d_theta - m/sin) Y and
    eth (spin 1) eta = -(d_theta - cot - m/sin) eta, so
        eth^2 Y    = Y'' - cot Y' + m^2 Y/sin^2 - 2m (Y' - cot Y)/sin,
        ethbar^2 Y = Y'' - cot Y' + m^2 Y/sin^2 + 2m (Y' - cot Y)/sin,
    Y'' from the Legendre equation, Y'' = -cot Y' - (l(l+1) - m^2/sin^2) Y,
    and Y' = m cot Y + sqrt((l-m)(l+m+1)) e^{-i phi} Y_{l,m+1} (the
    raising operator L+ = e^{i phi}(d_theta + i cot d_phi) on Condon-Shortley
    Y_lm; common practice)."""
    sn, ct = np.sin(theta), np.cos(theta) / np.sin(theta)
    y = ylm(l, m, theta, phi)
    yp = m * ct * y + math.sqrt((l - m) * (l + m + 1)) * np.exp(-1j * phi) * ylm(l, m + 1, theta, phi)
    ypp = -ct * yp - (l * (l + 1) - m * m / sn ** 2) * y
    e2 = ypp - ct * yp + m * m * y / sn ** 2 - np.sign(s) * 2 * m * (yp - ct * y) / sn
    return math.sqrt(math.factorial(l - 2) / math.factorial(l + 2)) * e2


def test_reference_harmonics():
    # The reference itself against a closed form: _{-2}Y_22 =
    # sqrt(5/(64 pi)) (1 + cos theta)^2 e^{2 i phi} (Goldberg et al. 1967's
    # explicit sum at l = m = 2; the form quoted throughout the
    # gravitational-wave literature; from memory), and the conjugation rule
    # _{-s}Y_lm = (-1)^{s+m} conj(_{s}Y_{l,-m}) (Goldberg et al. 1967).
    theta, phi = ring_centres(4)
    want = math.sqrt(5 / (64 * math.pi)) * (1 + np.cos(theta)) ** 2 * np.exp(2j * phi)
    assert np.max(np.abs(spin2_ylm(2, 2, theta, phi, -2) - want)) < 1e-14
    for l, m in ((3, 1), (5, -4), (7, 0)):
        a = spin2_ylm(l, m, theta, phi, -2)
        b = (-1) ** m * np.conj(spin2_ylm(l, -m, theta, phi, 2))
        assert np.max(np.abs(a - b)) < 1e-13


def random_eb(lmax, rng, n=2):
    """n random a_lm sets in clef's layout (m >= 0, l = 0, 1 zero, a_l0 real)."""
    out = []
    for _ in range(n):
        a = np.zeros(clef.alm_size(lmax), dtype=np.complex128)
        for m in range(lmax + 1):
            for l in range(max(m, 2), lmax + 1):
                a[clef.alm_index(lmax, l, m)] = rng.normal() + (1j * rng.normal() if m else 0)
        out.append(a)
    return out


def full_m(alm, lmax, l, m):
    """a_{l,m} for any sign of m: a_{l,-m} = (-1)^m conj(a_lm) (real maps)."""
    v = alm[clef.alm_index(lmax, l, abs(m))]
    return v if m >= 0 else (-1) ** m * np.conj(v)


def harmonics(lmax, theta, phi):
    """{(l, m, s): _{s}Y_lm at the points} for 2 <= l <= lmax, all m, s = +-2."""
    return {(l, m, s): spin2_ylm(l, m, theta, phi, s) for l in range(2, lmax + 1)
            for m in range(-l, l + 1) for s in (2, -2)}


@pytest.fixture(scope="module")
def grid8():
    nside, lmax = 8, 20
    theta, phi = ring_centres(nside)
    return nside, lmax, harmonics(lmax, theta, phi)


def test_spin_synthesis_against_direct_sum(grid8):
    nside, lmax, Y = grid8
    e, b = random_eb(lmax, np.random.default_rng(5))
    q, u = clef.ShtSpin(nside, lmax).synthesis(e, b)
    for s in (2, -2):
        want = sum(-(full_m(e, lmax, l, m) + np.sign(s) * 1j * full_m(b, lmax, l, m)) * Y[l, m, s]
                   for l in range(2, lmax + 1) for m in range(-l, l + 1))
        got = q + np.sign(s) * 1j * u
        assert np.max(np.abs(got - want)) < 1e-12 * np.max(np.abs(want))


def test_spin_analysis_against_direct_sum(grid8):
    # One pass without ring weights is the plain pixel quadrature
    # a_{+-2,lm} = (4 pi / npix) sum_p (Q +- iU) conj(_{+-2}Y_lm), and
    # a_E = -(a_2 + a_-2)/2, a_B = i (a_2 - a_-2)/2 (the conventions above).
    nside, lmax, Y = grid8
    rng = np.random.default_rng(6)
    npix = 12 * nside ** 2
    q, u = rng.normal(size=npix), rng.normal(size=npix)
    e, b = clef.ShtSpin(nside, lmax, no_ring_weights=True).analysis(q, u, iterations=0)
    omega = 4 * np.pi / npix
    for l in range(2, lmax + 1):
        for m in range(l + 1):
            a2 = omega * np.sum((q + 1j * u) * np.conj(Y[l, m, 2]))
            am2 = omega * np.sum((q - 1j * u) * np.conj(Y[l, m, -2]))
            i = clef.alm_index(lmax, l, m)
            assert abs(e[i] + (a2 + am2) / 2) < 1e-13, (l, m)
            assert abs(b[i] - 1j * (a2 - am2) / 2) < 1e-13, (l, m)
    assert np.all(e[[clef.alm_index(lmax, l, m) for m in range(2) for l in range(m, 2)]] == 0)


def test_spin_round_trip_and_layout():
    # Band-limited Q, U at nside 16, lmax 20: the iterated analysis returns
    # the a_lm synthesised (the accuracy table of docs/transforms.md); 2-d
    # stacks give the rows of 1-d calls, in chunks of the plan's nmaps.
    nside, lmax = 16, 20
    rng = np.random.default_rng(7)
    sets = [random_eb(lmax, rng) for _ in range(3)]
    plan = clef.ShtSpin(nside, lmax, nmaps=2)
    E = np.array([s[0] for s in sets])
    B = np.array([s[1] for s in sets])
    Q, U = plan.synthesis(E, B)
    assert Q.shape == (3, 12 * nside ** 2) and U.shape == Q.shape
    for k in range(3):
        q, u = clef.ShtSpin(nside, lmax).synthesis(E[k], B[k])
        assert np.array_equal(q, Q[k]) and np.array_equal(u, U[k])
    e, b = plan.analysis(Q, U, iterations=3)
    err = np.sqrt((np.sum(np.abs(e - E) ** 2) + np.sum(np.abs(b - B) ** 2)) /
                  (np.sum(np.abs(E) ** 2) + np.sum(np.abs(B) ** 2)))
    assert err < 1e-9, err
    # a pure-E sky analyses to no B (to the transform's accuracy)
    q, u = plan.synthesis(E[0], 0 * E[0])
    e0, b0 = plan.analysis(q, u)
    assert np.max(np.abs(b0)) < 1e-9 * np.max(np.abs(e0))
    assert (plan.nside, plan.lmax, plan.mmax, plan.npix, plan.nrings, plan.alm_size) == \
        (16, 20, 20, 3072, 63, clef.alm_size(20))


def test_spin_gil_released():
    # As test_behaviour.test_gil_released for clef.Sht: the main thread keeps
    # running while a spin-2 analysis runs in another.
    plan, single = timed_plan(lambda n: clef.ShtSpin(n, 2 * n),
                              lambda p: p.analysis(np.zeros(p.npix), np.zeros(p.npix)))
    q, u = np.random.default_rng(8).normal(size=(2, plan.npix))
    gap, took = longest_pause(lambda: plan.analysis(q, u))
    assert gap < 0.5 * took, (gap, took, single)


def test_spin_bad_arguments():
    plan = clef.ShtSpin(8, 16)
    m = np.zeros(plan.npix)
    with pytest.raises(TypeError, match="float64"):
        plan.analysis(m.astype(np.float32), m)
    with pytest.raises(ValueError, match=r"u must have shape \(768,\)"):
        plan.analysis(m, m[:-1])
    with pytest.raises(ValueError, match="same shape"):
        plan.analysis(m, np.zeros((2, plan.npix)))
    with pytest.raises(ValueError, match="C-contiguous"):
        plan.analysis(np.zeros((plan.npix, 2))[:, 0], m)
    bad = m.copy()
    bad[3] = np.nan
    with pytest.raises(ValueError, match="q holds a non-finite value"):
        plan.analysis(bad, m)
    with pytest.raises(ValueError, match="iterations"):
        plan.analysis(m, m, iterations=-1)
    a = np.zeros(plan.alm_size, dtype=np.complex128)
    with pytest.raises(TypeError, match="complex128"):
        plan.synthesis(a.real, a)
    with pytest.raises(ValueError, match="alm_b must have shape"):
        plan.synthesis(a, a[:-2])
    with pytest.raises(TypeError):
        plan.synthesis(a, a, iterations=1)
    with pytest.raises(ValueError, match="nmaps"):
        clef.ShtSpin(8, 16, nmaps=33)
    with pytest.raises(ValueError, match="mmax"):
        clef.ShtSpin(8, 16, mmax=20)
    with pytest.raises(clef.InvalidArgumentError, match="lmax = 1"):
        clef.ShtSpin(8, 1)
    with pytest.raises(clef.InvalidArgumentError):
        clef.ShtSpin(12, 16)


# ---- polarized maps ----------------------------------------------------------

def write_tqu(path, cols, nside, conv="COSMO", unit="uK"):
    """A HEALPix T/Q/U table written by astropy (not by clef)."""
    t = fits.BinTableHDU.from_columns([fits.Column(name=k, format="D", unit=unit, array=v)
                                       for k, v in cols])
    h = t.header
    h["PIXTYPE"], h["ORDERING"], h["NSIDE"], h["INDXSCHM"] = "HEALPIX", "RING", nside, "IMPLICIT"
    if conv is not None:
        h["POLCCONV"] = conv
    fits.HDUList([fits.PrimaryHDU(), t]).writeto(path, overwrite=True)


def tqu(nside, seed=1):
    rng = np.random.default_rng(seed)
    return [rng.normal(0, s, 12 * nside ** 2) for s in (100.0, 5.0, 5.0)]


def test_map_pol_round_trip(tmp_path):
    t, q, u = tqu(8)
    q[5] = np.nan
    clef.write_map_pol(tmp_path / "m.fits", [t, q, u], unit="uK", coordsys="G")
    with fits.open(tmp_path / "m.fits") as h:  # the file as astropy reads it
        d = h[1].data
        assert h[1].header["POLCCONV"] == "COSMO"
        assert list(d.columns.names) == ["TEMPERATURE", "Q_POLARISATION", "U_POLARISATION"]
        assert np.array_equal(d["U_POLARISATION"], u) and d["Q_POLARISATION"][5] < -1e30
    maps, meta = clef.read_map_pol(tmp_path / "m.fits")
    assert maps.shape == (3, 768) and meta["valid"].shape == (3, 768)
    assert np.array_equal(maps[0], t)
    # Q and U share one validity (map.h): pixel 5 is missing in both
    assert np.isnan(maps[1, 5]) and np.isnan(maps[2, 5]) and meta["nmissing"] == (0, 1, 1)
    ok = np.arange(768) != 5
    assert np.array_equal(maps[1, ok], q[ok]) and np.array_equal(maps[2, ok], u[ok])
    assert meta["polcconv"] == "COSMO" and not meta["iau"] and not meta["polcconv_missing"]
    assert meta["coordsys"] == "G" and meta["units"] == ("uK",) * 3 and meta["nside"] == 8
    qu, meta2 = clef.read_map_pol(tmp_path / "m.fits", temperature=False)
    assert qu.shape == (2, 768) and meta2["columns"] == ("Q_POLARISATION", "U_POLARISATION")
    # a (3, npix) array writes the same file content
    clef.write_map_pol(tmp_path / "m2.fits", np.array([t, q, u]), unit="uK", coordsys="G")
    assert np.array_equal(clef.read_map_pol(tmp_path / "m2.fits")[0], maps, equal_nan=True)


def test_polcconv(tmp_path, caplog):
    t, q, u = tqu(4)
    cols = [("TEMPERATURE", t), ("Q_POLARISATION", q), ("U_POLARISATION", u)]
    write_tqu(tmp_path / "iau.fits", cols, 4, "IAU")
    write_tqu(tmp_path / "none.fits", cols, 4, None)
    write_tqu(tmp_path / "odd.fits", cols, 4, "SOUTH")
    # IAU: U negated into COSMO (the HEALPix FITS format specification)
    m, meta = clef.read_map_pol(tmp_path / "iau.fits")
    assert np.array_equal(m[2], -u) and np.array_equal(m[1], q) and meta["iau"]
    assert meta["polcconv"] == "IAU"
    # an override wins over the file
    m, meta = clef.read_map_pol(tmp_path / "iau.fits", polcconv="COSMO")
    assert np.array_equal(m[2], u) and not meta["iau"]
    # missing: COSMO with a library warning through logging
    with caplog.at_level(logging.WARNING, logger="clef"):
        m, meta = clef.read_map_pol(tmp_path / "none.fits")
    assert meta["polcconv_missing"] and np.array_equal(m[2], u)
    assert any("POLCCONV is missing" in r.message for r in caplog.records)
    with pytest.raises(clef.FormatError, match="POLCCONV = 'SOUTH'"):
        clef.read_map_pol(tmp_path / "odd.fits")
    with pytest.raises(ValueError, match="polcconv must be"):
        clef.read_map_pol(tmp_path / "iau.fits", polcconv="iau-ish")


def test_map_pol_columns_and_files(tmp_path):
    t, q, u = tqu(4)
    write_tqu(tmp_path / "tq.fits", [("TEMPERATURE", t), ("Q_POLARISATION", q)], 4)
    write_tqu(tmp_path / "u.fits", [("U_POLARISATION", u)], 4)
    write_tqu(tmp_path / "stokes.fits", [("I_STOKES", t), ("Q_STOKES", q), ("U_STOKES", u),
                                         ("EXTRA", q + u)], 4)
    with pytest.raises(clef.InvalidArgumentError, match="U column missing") as e:
        clef.read_map_pol(tmp_path / "tq.fits")
    assert "TEMPERATURE" in e.value.message and e.value.status == 1
    m, meta = clef.read_map_pol(tmp_path / "tq.fits", u_path=tmp_path / "u.fits")
    assert np.array_equal(m, [t, q, u])
    m, meta = clef.read_map_pol(tmp_path / "stokes.fits")
    assert meta["columns"] == ("I_STOKES", "Q_STOKES", "U_STOKES")
    m, meta = clef.read_map_pol(tmp_path / "stokes.fits", u_column="EXTRA")
    assert np.array_equal(m[2], q + u)
    m, meta = clef.read_map_pol(tmp_path / "stokes.fits", u_column=4, t_column=1, q_column=2)
    assert np.array_equal(m[2], q + u)
    with pytest.raises(clef.FileError, match="nope.fits"):
        clef.read_map_pol(tmp_path / "nope.fits")
    with pytest.raises(ValueError, match="q_column must be a positive"):
        clef.read_map_pol(tmp_path / "stokes.fits", q_column=0)
    with pytest.raises(TypeError):
        clef.read_map_pol(tmp_path / "stokes.fits", hdu=1.5)
    with pytest.raises(TypeError):
        clef.read_map_pol(tmp_path / "stokes.fits", polcconf="IAU")


def test_write_map_pol_bad_input(tmp_path):
    t, q, u = tqu(4)
    with pytest.raises(ValueError, match="three RING maps"):
        clef.write_map_pol(tmp_path / "x.fits", [t, q])
    with pytest.raises(ValueError, match=r"maps\[2\] \(U\) has 191 pixels"):
        clef.write_map_pol(tmp_path / "x.fits", [t, q, u[:-1]])
    with pytest.raises(ValueError, match=r"map U has nside 8, T has 4"):
        clef.write_map_pol(tmp_path / "x.fits", [t, q, tqu(8)[2]])
    with pytest.raises(TypeError, match=r"maps\[1\] \(Q\) must be a float64"):
        clef.write_map_pol(tmp_path / "x.fits", [t, q.astype(np.float32), u])
    with pytest.raises(ValueError, match="coordsys"):
        clef.write_map_pol(tmp_path / "x.fits", [t, q, u], coordsys="Q")
    with pytest.raises(clef.FileError):
        clef.write_map_pol(tmp_path / "no" / "x.fits", [t, q, u])
    assert not list(tmp_path.iterdir())  # nothing half-written


# ---- against the command line ------------------------------------------------

@pytest.fixture(scope="module")
def polsky(tmp_path_factory):
    """A polarized spectrum file (TT of the analytic model; EE, BB, TE
    smooth shapes with TE^2 < TT EE), T/Q/U skies made by the CLI at nside
    32, a tapered mask and a second (polarization) mask."""
    d = tmp_path_factory.mktemp("polsky")
    lmax = 95
    l = np.arange(lmax + 1)
    tt = clef.theory_cl(lmax=lmax)
    ee = 0.04 * tt * (1 + l / 50.0)
    bb = 0.002 * tt
    te = 0.5 * np.sqrt(tt * ee) * np.cos(l / 30.0)
    with open(d / "pol.txt", "w") as f:
        f.write("# columns: l TT EE BB TE (C_l, uK^2)\n")
        for i in range(2, lmax + 1):
            f.write(f"{i} {tt[i]!r} {ee[i]!r} {bb[i]!r} {te[i]!r}\n")
    for s in (1, 2):
        run_cli("simulate", "--polarization", "--quiet", "--nside", 32, "--cl", d / "pol.txt",
                "--seed", 10 + s, "--beam-fwhm", 60, "--noise-depth", 20, "--coordsys", "G",
                "--output", d / f"sky{s}.fits")
    run_cli("mask", "--quiet", "--nside", 32, "--latitude-cut", 10, "--taper", "c2",
            "--taper-width", 8, "--coordsys", "G", "--output", d / "mask.fits")
    run_cli("mask", "--quiet", "--nside", 32, "--latitude-cut", 20, "--taper", "c1",
            "--taper-width", 10, "--coordsys", "G", "--output", d / "pmask.fits")
    return d


@pytest.mark.parametrize("extra,kw", [
    ([], {}),
    (["--seed", "99", "--beam-fwhm", "45", "--noise-depth", "15", "--pol-noise-depth", "40"],
     dict(seed=99, beam_fwhm=45.0, noise_depth=15.0, pol_noise_depth=40.0)),
    (["--lmax", "40", "--no-pixel-window", "--noise-depth", "10", "--seed", "123456789012"],
     dict(lmax=40, pixel_window=False, noise_depth=10.0, seed=123456789012)),
])
def test_simulate_pol_same_as_cli(polsky, tmp_path, extra, kw):
    nside = 16
    run_cli("simulate", "--polarization", "--quiet", "--nside", nside, "--cl",
            polsky / "pol.txt", "--output", tmp_path / "s.fits", *extra)
    lmax = kw.get("lmax", 3 * nside - 1)
    cl = clef.read_cl_pol(polsky / "pol.txt", lmax)
    assert cl.shape == (4, lmax + 1)
    got, alm = clef.simulate_pol(nside, cl, return_alm=True, **kw)
    with fits.open(tmp_path / "s.fits") as h:  # the CLI's file, read by astropy
        d = h[1].data
        want = np.array([d[c] for c in ("TEMPERATURE", "Q_POLARISATION", "U_POLARISATION")],
                        dtype=np.float64)
        assert h[1].header["POLCCONV"] == "COSMO"
    close(got, want)
    close(clef.read_map_pol(tmp_path / "s.fits")[0], want)  # ... and by clef
    # the a_lm are sim_alm_pol's, whose T is sim_alm's deviates (docs/
    # simulation.md; sqrt(TT) g vs sqrt(TT/2) g per part: equal to rounding)
    seed = kw.get("seed", 1)
    assert np.array_equal(alm, clef.sim_alm_pol(cl, seed=seed))
    t0 = clef.sim_alm(cl[0], seed=seed)
    assert np.max(np.abs(alm[0] - t0)) <= 1e-15 * np.max(np.abs(t0))


def test_simulate_pol_bad_input(polsky):
    cl = clef.read_cl_pol(polsky / "pol.txt", 47)
    with pytest.raises(ValueError, match=r"cl must have shape \(4, lmax \+ 1\)"):
        clef.simulate_pol(16, cl[:3])
    with pytest.raises(ValueError, match="cl must have 2 dimensions"):
        clef.simulate_pol(16, cl[0])
    with pytest.raises(ValueError, match="cl has 31 multipoles"):
        clef.simulate_pol(16, np.ascontiguousarray(cl[:, :31]))
    with pytest.raises(ValueError, match="lmax must be in"):
        clef.simulate_pol(16, cl, lmax=48)
    with pytest.raises(ValueError, match="pol_noise_depth"):
        clef.simulate_pol(16, cl, pol_noise_depth=-1.0)
    with pytest.raises(ValueError, match="choose one of beam_fwhm and beam"):
        clef.simulate_pol(16, cl, beam_fwhm=10.0, beam=np.ones(48))
    with pytest.raises(ValueError, match="C-contiguous"):
        clef.simulate_pol(16, np.asfortranarray(cl))
    bad = cl.copy()
    bad[3, 10] = 2 * np.sqrt(cl[0, 10] * cl[1, 10])  # TE^2 > TT EE
    with pytest.raises(clef.InvalidArgumentError, match="10"):
        clef.simulate_pol(16, bad)
    with pytest.raises(clef.FileError):
        clef.read_cl_pol(polsky / "missing.txt", 47)
    with pytest.raises(TypeError):
        clef.simulate_pol(16, cl, splits=2)


def cli_pol(tmp_path, args):
    out = tmp_path / "pol"
    run_cli("spectrum", "--polarization", *args, "--no-cache", "--quiet", "--output", out)
    j = json.load(open(f"{out}.json"))
    tabs = {}
    with fits.open(f"{out}.fits") as h:
        for k, name in enumerate(SPECTRA, start=1):
            bp = h["BANDPOWER", k]
            assert bp.header["SPECTRUM"] == name
            tabs[name] = dict(
                l_lo=np.array(bp.data["LMIN"]), l_hi=np.array(bp.data["LMAX"]),
                dl=np.array(bp.data["D_BAND"], dtype=np.float64),
                dl_err=np.array(bp.data["D_SIGMA"], dtype=np.float64),
                cl=np.array(bp.data["C_BAND"], dtype=np.float64),
                cov=np.array(h["BANDCOV", k].data, dtype=np.float64),
                windows=np.array(h["BANDWIN", k].data, dtype=np.float64))
    return j, tabs


def compare(r, j, tabs):
    for name in SPECTRA:
        a, b = r[name], tabs[name]
        assert np.array_equal(a["l_lo"], b["l_lo"]) and np.array_equal(a["l_hi"], b["l_hi"])
        for k in ("dl", "dl_err", "cl", "cov", "windows"):
            close(a[k], b[k])
        close(a["dl"], j["spectra"][name]["d_l"])
        assert a["meta"]["SPECTRUM"] == name
    s = r["summary"]
    assert s["spectrum"] == j["kind"] and s["nside"] == j["nside"]
    assert s["lmax"] == j["lmax"] and s["lmax_coupled"] == j["lmax_ext"]
    close(s["rcond_ee_bb"], j["rcond_ee_bb"])
    close(s["rcond_eb_be"], j["rcond_eb_be"])
    assert r["leakage"]["EE_to_BB"].shape == (s["nbins"], s["lmax_coupled"] + 1)


@pytest.mark.parametrize("case", ["default", "options", "pair", "pure", "two", "tables"])
def test_spectrum_pol_same_as_cli(polsky, tmp_path, case):
    sky1, sky2, mask = polsky / "sky1.fits", polsky / "sky2.fits", polsky / "mask.fits"
    if case == "two":
        # maps from two instruments: the second map's own beam
        args = [sky1, sky2, "--mask", mask, "--bin-width", "8", "--beam-fwhm", "60",
                "--second-beam-fwhm", "75"]
        kw, files = dict(bin_width=8, beam_fwhm=60.0, second_beam_fwhm=75.0), [sky1, sky2]
    elif case == "tables":
        # a beam table and the T and P noise spectra to subtract, as files and arrays
        l = np.arange(96)
        sig = 60.0 / 60 * np.pi / 180 / np.sqrt(8 * np.log(2))
        beam = np.exp(-0.5 * l * (l + 1) * sig ** 2)
        area = 4 * np.pi / (12 * 32 * 32)
        nt = np.full(96, 0.5 * area)
        npol = np.full(96, 1.5 * area)
        for name, v, head in (("beam.txt", beam, ""), ("nt.txt", nt, "# columns: l C_l\n"),
                              ("np.txt", npol, "# columns: l C_l\n")):
            with open(tmp_path / name, "w") as f:
                f.write(head)
                for i in l:
                    f.write(f"{i} {v[i]!r}\n")
        args = [sky1, "--mask", mask, "--bin-width", "10", "--beam-table", tmp_path / "beam.txt",
                "--noise-spectrum", tmp_path / "nt.txt", "--pol-noise-spectrum",
                tmp_path / "np.txt"]
        kw = dict(bin_width=10, beam=beam, noise_cl=nt, pol_noise_cl=npol)
        files = [sky1]
    elif case == "default":
        args, kw, files = [sky1, "--mask", mask], {}, [sky1]
    elif case == "options":
        args = [sky1, "--mask", mask, "--pol-mask", polsky / "pmask.fits", "--bin-width", "10",
                "--beam-fwhm", "60", "--no-pixel-window", "--iterations", "2"]
        kw, files = dict(bin_width=10, beam_fwhm=60.0, pixel_window=False, iterations=2), [sky1]
    elif case == "pure":
        args = [sky1, "--mask", mask, "--bin-width", "10", "--pure-b"]
        kw, files = dict(bin_width=10, pure_b=True), [sky1]
    else:
        args = [sky1, sky2, "--mask", mask, "--lmax", "50", "--bin-width", "8"]
        kw, files = dict(lmax=50, bin_width=8), [sky1, sky2]
    j, tabs = cli_pol(tmp_path, args)
    maps = [clef.read_map_pol(f)[0] for f in files]
    w = clef.read_map(mask)[0]
    if case == "options":
        kw["pol_mask"] = clef.read_map(polsky / "pmask.fits")[0]
    r = clef.spectrum_pol(maps[0], w, maps[1] if len(maps) > 1 else None, unit="uK",
                          coordsys="G", mask_coordsys="G", cache=False, **kw)
    compare(r, j, tabs)
    assert r["summary"]["warnings"] == j["warnings"]
    assert r["summary"]["pure_b"] is j["pure_b"] is (case == "pure")
    if case == "pure":
        close(r["summary"]["pure_b_window_tail"][0], j["pure_b_window_tail"][0])
        assert r["BB"]["meta"]["PURE_B"] == 1
    # TT is clef.spectrum of T, unchanged (spectrum.h)
    tt = clef.spectrum(maps[0][0], w, maps[1][0] if len(maps) > 1 else None, unit="uK",
                       coordsys="G", mask_coordsys="G", cache=False, peak=False,
                       **{k: v for k, v in kw.items()
                          if k not in ("pol_mask", "pure_b", "pol_noise_cl")})
    assert np.array_equal(tt["dl"], r["TT"]["dl"]) and np.array_equal(tt["cov"], r["TT"]["cov"])


def test_spectrum_pol_iau_file(polsky, tmp_path):
    # An IAU file (U negated): the CLI converts on reading, so does
    # read_map_pol, giving back the COSMO maps; an explicit convention on
    # both sides gives the same numbers too.
    maps, _ = clef.read_map_pol(polsky / "sky1.fits")
    write_tqu(tmp_path / "iau.fits", [("TEMPERATURE", maps[0]), ("Q_POLARISATION", maps[1]),
                                      ("U_POLARISATION", -maps[2])], 32, "IAU")
    w = clef.read_map(polsky / "mask.fits")[0]
    j, tabs = cli_pol(tmp_path, [tmp_path / "iau.fits", "--mask", polsky / "mask.fits",
                                 "--bin-width", "12"])
    m, meta = clef.read_map_pol(tmp_path / "iau.fits")
    assert meta["iau"] and np.array_equal(m, maps)
    r = clef.spectrum_pol(m, w, bin_width=12, cache=False)
    compare(r, j, tabs)
    # --polcconv COSMO on both sides overrides the file: U is taken as written.
    j2, tabs2 = cli_pol(tmp_path, [tmp_path / "iau.fits", "--mask", polsky / "mask.fits",
                                   "--bin-width", "12", "--polcconv", "COSMO"])
    m2, meta2 = clef.read_map_pol(tmp_path / "iau.fits", polcconv="COSMO")
    assert not meta2["iau"] and np.array_equal(m2[2], -maps[2])
    compare(clef.spectrum_pol(m2, w, bin_width=12, cache=False), j2, tabs2)


def test_spectrum_pol_noise_and_nan(polsky):
    maps, _ = clef.read_map_pol(polsky / "sky1.fits")
    w = clef.read_map(polsky / "mask.fits")[0]
    r0 = clef.spectrum_pol(maps, w, bin_width=10, cache=False)
    # White Q/U noise N_l subtracted through M+ + M- (spectrum.h): a constant
    # N_l lowers the auto EE and BB band powers by about N_l l(l+1)/2pi
    # times the beam and pixel window correction, and leaves TT, TE alone.
    nl = np.full(3 * 32, 1e-4)
    r1 = clef.spectrum_pol(maps, w, bin_width=10, cache=False, pol_noise_cl=nl)
    assert np.array_equal(r0["TT"]["dl"], r1["TT"]["dl"])
    assert np.array_equal(r0["TE"]["dl"], r1["TE"]["dl"])
    le = r0["EE"]["l_eff"]
    drop = (r0["EE"]["dl"] - r1["EE"]["dl"]) / (1e-4 * le * (le + 1) / (2 * np.pi))
    assert np.all(drop > 0.5) and np.all(drop < 2.0), drop
    # A NaN in U alone makes the pixel missing in Q too: the same spectra as
    # NaN in both (map.h: Q and U share one validity).
    a, b = maps.copy(), maps.copy()
    a[2, 100:140] = np.nan
    b[1:, 100:140] = np.nan
    ra = clef.spectrum_pol(a, w, bin_width=10, cache=False)
    rb = clef.spectrum_pol(b, w, bin_width=10, cache=False)
    for name in SPECTRA:
        assert np.array_equal(ra[name]["dl"], rb[name]["dl"])
    assert not np.array_equal(ra["EE"]["dl"], r0["EE"]["dl"])
    assert np.isnan(a[2, 100]) and not np.isnan(a[1, 100])  # the caller's array unchanged


def test_spectrum_pol_bad_arguments(polsky):
    maps, _ = clef.read_map_pol(polsky / "sky1.fits")
    w = clef.read_map(polsky / "mask.fits")[0]
    with pytest.raises(ValueError, match=r"map1 must be a \(3, npix\) float64 array"):
        clef.spectrum_pol(maps[:2], w)
    with pytest.raises(TypeError, match=r"map1\[0\] \(T\) must be a float64"):
        clef.spectrum_pol(maps.astype(np.float32), w)
    with pytest.raises(ValueError, match="mask holds NaN"):
        clef.spectrum_pol(maps, np.where(w > 0.5, w, np.nan))
    with pytest.raises(clef.InvalidArgumentError, match="1.5"):
        clef.spectrum_pol(maps, w * 1.5)
    with pytest.raises(clef.InvalidArgumentError, match="nside"):
        clef.spectrum_pol(maps, w, pol_mask=clef.mask_full(16))
    with pytest.raises(ValueError, match="choose one of bins, log_bins and bin_width"):
        clef.spectrum_pol(maps, w, bin_width=10, log_bins=4)
    with pytest.raises(ValueError, match="iterations must be in 0..20"):
        clef.spectrum_pol(maps, w, iterations=25)
    with pytest.raises(ValueError, match="pol_noise_cl holds a non-finite"):
        clef.spectrum_pol(maps, w, pol_noise_cl=np.full(96, np.inf))
    with pytest.raises(clef.InvalidArgumentError, match="polarization noise spectrum stops"):
        clef.spectrum_pol(maps, w, bin_width=10, pol_noise_cl=np.zeros(20), cache=False)
    with pytest.raises(TypeError):
        clef.spectrum_pol(maps, w, peak=True)
    with pytest.raises(clef.InvalidArgumentError, match="lmax"):
        clef.spectrum_pol(maps, w, lmax=200)
    # the second instrument: checked as the CLI checks it, and only for a pair
    with pytest.raises(ValueError, match="second_beam_fwhm must not be negative"):
        clef.spectrum_pol(maps, w, maps, second_beam_fwhm=-5.0)
    with pytest.raises(ValueError, match="choose one of second_beam_fwhm and second_beam"):
        clef.spectrum_pol(maps, w, maps, second_beam_fwhm=5.0, second_beam=np.ones(96))
    with pytest.raises(clef.InvalidArgumentError, match="second beam or transfer"):
        clef.spectrum_pol(maps, w, second_beam_fwhm=5.0, cache=False)
    with pytest.raises(clef.InvalidArgumentError, match="second beam or transfer"):
        clef.spectrum(maps[0], w, second_transfer=np.ones(96), cache=False, peak=False)

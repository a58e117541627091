"""clef.Sht against an independent evaluation: scipy.special.sph_harm at
HEALPix pixel centres computed here from the RING formulas (Gorski et al.
2005, ApJ 622, 759, eqs. 4-9), direct sums in numpy, l <= 50."""
import numpy as np
import pytest
from scipy.special import sph_harm

import clef


def ring_centres(nside):
    """(theta, phi) of every RING pixel centre (Gorski et al. 2005, eqs. 4-9)."""
    th, ph = [], []
    for i in range(1, 4 * nside):
        if i < nside:                       # north polar cap
            z = 1 - i * i / (3.0 * nside * nside)
            n, shift = 4 * i, 0.5
            phis = np.pi / (2 * i) * (np.arange(1, n + 1) - shift)
        elif i <= 3 * nside:                # equatorial belt
            z = 4.0 / 3 - 2.0 * i / (3 * nside)
            s = (i - nside + 1) % 2
            # the first pixel at phi = 0 on unshifted rings (s = 0), as
            # chealpix's pix2ang_ring orders them
            phis = np.pi / (2 * nside) * (np.arange(1, 4 * nside + 1) - 1 + s / 2.0)
        else:                               # south polar cap
            k = 4 * nside - i
            z = -(1 - k * k / (3.0 * nside * nside))
            phis = np.pi / (2 * k) * (np.arange(1, 4 * k + 1) - 0.5)
        th.append(np.full(phis.size, np.arccos(z)))
        ph.append(phis)
    return np.concatenate(th), np.concatenate(ph)


def ylm_table(lmax, theta, phi):
    """Y_lm (m >= 0) at the points, in clef's m-major a_lm order."""
    cols = []
    for m in range(lmax + 1):
        for l in range(m, lmax + 1):
            cols.append(sph_harm(m, l, phi, theta))
    return np.array(cols)


def random_alm(lmax, rng):
    a = np.zeros(clef.alm_size(lmax), dtype=np.complex128)
    i = 0
    for m in range(lmax + 1):
        for l in range(m, lmax + 1):
            a[i] = rng.normal() + (1j * rng.normal() if m else 0)
            i += 1
    return a


def direct_synthesis(alm, Y):
    lmax = int(round((np.sqrt(8 * alm.size + 1) - 3) / 2))
    w = np.array([1.0 if m == 0 else 2.0 for m in range(lmax + 1) for _ in range(m, lmax + 1)])
    return np.real((w * alm) @ Y)


@pytest.mark.parametrize("nside,lmax", [(8, 20), (16, 47)])
def test_synthesis_against_scipy(nside, lmax):
    rng = np.random.default_rng(nside)
    theta, phi = ring_centres(nside)
    Y = ylm_table(lmax, theta, phi)
    alm = random_alm(lmax, rng)
    plan = clef.Sht(nside, lmax)
    got = plan.synthesis(alm)
    want = direct_synthesis(alm, Y)
    assert np.max(np.abs(got - want)) < 1e-12 * np.max(np.abs(want)) * lmax


def test_pixel_centres_agree_with_plan():
    nside = 8
    theta, phi = ring_centres(nside)
    plan = clef.Sht(nside, 10)
    for ring in (1, 5, 8, 16, 24, 31):
        r = plan.ring_info(ring)
        sl = slice(r["first"], r["first"] + r["npix"])
        assert np.allclose(np.cos(theta[sl]), r["z"], rtol=0, atol=1e-14)
        assert phi[sl][0] == pytest.approx(r["phi0"], abs=1e-14)


def test_plain_analysis_is_the_direct_sum():
    # no ring weights, no iterations: a_lm = (4 pi / npix) sum_p m_p Y*_lm(p)
    nside, lmax = 16, 50
    rng = np.random.default_rng(2)
    theta, phi = ring_centres(nside)
    Y = ylm_table(lmax, theta, phi)
    m = rng.normal(size=12 * nside ** 2)
    plan = clef.Sht(nside, lmax, no_ring_weights=True)
    got = plan.analysis(m, iterations=0)
    want = (4 * np.pi / m.size) * (np.conj(Y) @ m)
    assert np.max(np.abs(got - want)) < 1e-12 * np.max(np.abs(want)) * 10


def test_analysis_inverts_synthesis_band_limited():
    nside, lmax = 16, 24
    rng = np.random.default_rng(3)
    alm = random_alm(lmax, rng)
    plan = clef.Sht(nside, lmax, nmaps=2)
    maps = plan.synthesis(np.stack([alm, 2 * alm]))
    back = plan.analysis(maps, iterations=3)
    assert back.shape == (2, alm.size)
    # Jacobi-refined quadrature of a band-limited map below 2 nside: the
    # error falls geometrically with the iterations (docs/transforms.md).
    assert np.max(np.abs(back[0] - alm)) < 1e-6
    assert np.allclose(back[1], 2 * back[0], rtol=0, atol=1e-12)


def test_legendre_lambda_against_scipy():
    z = 0.3
    for m in (0, 3, 17):
        lam = clef.legendre_lambda(50, m, z)
        want = [sph_harm(m, l, 0.0, np.arccos(z)).real for l in range(m, 51)]
        assert np.allclose(lam, want, rtol=1e-12, atol=1e-14)


def test_alm_cl_formula():
    rng = np.random.default_rng(4)
    a, b = random_alm(12, rng), random_alm(12, rng)
    cl = clef.alm_cl(a, b)
    # C_l = (Re a_l0 b_l0* + 2 sum_m>0 Re a_lm b_lm*) / (2l+1), sht.h
    want = np.zeros(13)
    i = 0
    for m in range(13):
        for l in range(m, 13):
            want[l] += (1 if m == 0 else 2) * (a[i] * np.conj(b[i])).real
            i += 1
    want /= 2 * np.arange(13) + 1
    assert np.allclose(cl, want, rtol=1e-13)
    assert clef.alm_index(12, 5, 2) == 2 * (25 - 2) // 2 + 5


def test_alm_file_round_trip(tmp_path):
    a = random_alm(10, np.random.default_rng(6))
    clef.write_alm(tmp_path / "a.fits", a)
    back, lmax, mmax = clef.read_alm(tmp_path / "a.fits")
    assert (lmax, mmax) == (10, 10) and np.array_equal(back, a)


def test_bad_transform_input():
    plan = clef.Sht(4, 8)
    with pytest.raises(ValueError, match="shape"):
        plan.analysis(np.zeros(100))
    with pytest.raises(TypeError, match="float64"):
        plan.analysis(np.zeros(plan.npix, dtype=np.int64))
    m = np.zeros(plan.npix)
    m[3] = np.nan
    with pytest.raises(ValueError, match="non-finite"):
        plan.analysis(m)
    with pytest.raises(TypeError, match="complex128"):
        plan.synthesis(np.zeros(plan.alm_size))
    with pytest.raises(ValueError, match="alm_size"):
        plan.synthesis(np.zeros(3, dtype=complex))
    with pytest.raises(ValueError, match="iterations"):
        plan.analysis(np.zeros(plan.npix), iterations=-1)
    with pytest.raises(clef.InvalidArgumentError, match="nside"):
        clef.Sht(3, 8)
    with pytest.raises(TypeError):
        clef.Sht(4, 8, iterations=3)

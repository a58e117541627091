"""clef.read_map / write_map: maps read back identical to what the CLI and
astropy (an outside reader) see; bad arrays and files raise clear errors."""
import numpy as np
import pytest
from astropy.io import fits

import clef
from conftest import run_cli


def test_read_matches_astropy(sky):
    pix, meta = clef.read_map(sky / "sky_split1.fits")
    assert meta["nside"] == 64 and meta["npix"] == 12 * 64 ** 2
    assert meta["ordering"] == "RING" and meta["coordsys"] == "G" and meta["unit"] == "uK"
    with fits.open(sky / "sky_split1.fits") as h:
        col = np.asarray(h[1].data.field(0), dtype=np.float64).ravel()
    assert np.array_equal(pix, col)
    assert meta["valid"].all() and meta["nmissing"] == 0


def test_write_read_back_through_cli(tmp_path):
    rng = np.random.default_rng(5)
    m = rng.normal(size=12 * 16 ** 2)
    m[[7, 100]] = np.nan
    clef.write_map(tmp_path / "m.fits", m, unit="uK", coordsys="E", column="SIGNAL")
    back, meta = clef.read_map(tmp_path / "m.fits")
    assert np.array_equal(np.isnan(back), np.isnan(m))
    assert np.array_equal(back[~np.isnan(m)], m[~np.isnan(m)])  # float64: exact
    assert meta["coordsys"] == "E" and meta["column"] == "SIGNAL" and meta["nmissing"] == 2
    # The CLI's own reader (clef inspect) sees the same file.
    out = run_cli("inspect", tmp_path / "m.fits")
    assert "16" in out


def test_nested_file_is_converted(tmp_path):
    # A NESTED file written by astropy: pixel n of NESTED is pixel
    # nest2ring(n) of RING; clef converts on reading (Gorski et al. 2005).
    nside = 4
    npix = 12 * nside ** 2
    vals = np.arange(npix, dtype=np.float64)
    cols = fits.ColDefs([fits.Column(name="T", format="D", array=vals, unit="uK")])
    t = fits.BinTableHDU.from_columns(cols)
    t.header["PIXTYPE"] = "HEALPIX"
    t.header["ORDERING"] = "NESTED"
    t.header["NSIDE"] = nside
    t.header["INDXSCHM"] = "IMPLICIT"
    t.header["FIRSTPIX"] = 0
    t.header["LASTPIX"] = npix - 1
    fits.HDUList([fits.PrimaryHDU(), t]).writeto(tmp_path / "n.fits")
    pix, meta = clef.read_map(tmp_path / "n.fits")
    assert meta["ordering"] == "NESTED"
    # RING pixels 0..3 (the north-polar ring, in increasing phi) are the
    # north corners of base faces 0..3, NESTED index nside^2 - 1 of each
    # face: 15, 31, 47, 63 at nside 4 (HEALPix scheme, Gorski et al. 2005,
    # from memory).
    assert list(pix[:4]) == [15.0, 31.0, 47.0, 63.0]
    assert sorted(pix) == list(vals)


def test_header_matches_read_map(sky):
    # The header alone: read_map's meta without the values; the same
    # errors as read_map for a missing file and an unknown column.
    _, meta = clef.read_map(sky / "sky_split1.fits")
    head = clef.read_map_header(sky / "sky_split1.fits")
    assert head == {k: meta[k] for k in ("nside", "npix", "ordering", "coordsys", "unit",
                                         "column", "hdu")}
    with pytest.raises(clef.FileError):
        clef.read_map_header("/nonexistent/map.fits")
    with pytest.raises(clef.InvalidArgumentError, match="NOPE"):
        clef.read_map_header(sky / "sky_split1.fits", column="NOPE")


def test_missing_file():
    with pytest.raises(clef.FileError) as e:
        clef.read_map("/nonexistent/map.fits")
    assert e.value.status == 3 and "/nonexistent/map.fits" in str(e.value)
    assert isinstance(e.value, OSError)


def test_not_a_map(tmp_path):
    (tmp_path / "t.fits").write_bytes(b"SIMPLE  = this is not FITS" + b" " * 3000)
    with pytest.raises(clef.Error) as e:
        clef.read_map(tmp_path / "t.fits")
    assert e.value.status in (3, 4) and "t.fits" in e.value.message


def test_unknown_column(sky):
    with pytest.raises(clef.InvalidArgumentError, match="NOPE"):
        clef.read_map(sky / "sky_split1.fits", column="NOPE")


def test_bad_arrays(tmp_path):
    good = np.zeros(12 * 4 ** 2)
    with pytest.raises(TypeError, match="float64"):
        clef.write_map(tmp_path / "a.fits", good.astype(np.float32))
    with pytest.raises(ValueError, match="12 nside\\^2"):
        clef.write_map(tmp_path / "a.fits", np.zeros(100))
    with pytest.raises(ValueError, match="C-contiguous"):
        clef.write_map(tmp_path / "a.fits", np.zeros(2 * 192)[::2])
    with pytest.raises(ValueError, match="dimension"):
        clef.write_map(tmp_path / "a.fits", np.zeros((2, 192)))
    bad = good.copy()
    bad[5] = np.inf
    with pytest.raises(ValueError, match="infinite value at RING pixel 5"):
        clef.write_map(tmp_path / "a.fits", bad)
    with pytest.raises(ValueError, match="coordsys"):
        clef.write_map(tmp_path / "a.fits", good, coordsys="X")
    with pytest.raises(TypeError):
        clef.write_map(tmp_path / "a.fits", good, colour="red")
    assert not (tmp_path / "a.fits").exists()


def test_stats():
    m = np.array([1.0, 2.0, 3.0, np.nan] + [2.0] * 44)
    s = clef.map_stats(m)
    v = m[~np.isnan(m)]
    assert s["nvalid"] == 47 and s["nmissing"] == 1
    assert s["mean"] == pytest.approx(v.mean(), rel=1e-14)
    assert s["stddev"] == pytest.approx(v.std(), rel=1e-12)  # numpy's population convention

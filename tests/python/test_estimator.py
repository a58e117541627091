"""clef.Estimator and clef.spectrum_run (the estimator of many fields,
include/clef/estimator.h; run files, include/clef/run.h) against
`clef spectrum --run` on the same run file: identical band powers, errors,
per-pair covariance, windows, joint covariance and warnings (to 1e-12);
and the argument checks."""
import json
import math

import numpy as np
import pytest
from astropy.io import fits

import clef
from conftest import run_cli

FIELDS = """fields:
  - name: a
    maps: [sky_split1.fits, sky_split2.fits]
    mask: mask.fits
    beam-fwhm: 30
  - name: b
    maps: sky_split1.fits
    mask: mask.fits
    beam-fwhm: 30
    noise-spectrum: noise.txt
  - name: c
    maps: other.fits
    mask: mask2.fits
    beam-table: beam.txt
    transfer: transfer.txt
"""
SETTINGS = """pairs:
  - [c, a]
  - [b, b]
  - [b, c]
spectrum:
  lmax: 60
  bin-width: 12
  iterations: 2
  pixel-window: false
  keep-multipoles: true
  joint-covariance: false
  covariance-model: model.txt
"""


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    """Three fields at nside 32 (one in two noise splits; beams, a beam
    table, a transfer function, a noise spectrum; two masks), made by the
    CLI, and two run files: all pairs with the defaults, and chosen pairs
    with every setting changed."""
    d = tmp_path_factory.mktemp("runs")
    run_cli("simulate", "--quiet", "--nside", 32, "--model", "--seed", 3, "--beam-fwhm", 30,
            "--noise-depth", 30, "--splits", 2, "--output", d / "sky.fits")
    run_cli("simulate", "--quiet", "--nside", 32, "--model", "--seed", 4, "--beam-fwhm", 40,
            "--output", d / "other.fits")
    run_cli("mask", "--quiet", "--nside", 32, "--latitude-cut", 15, "--taper", "c2",
            "--taper-width", 5, "--output", d / "mask.fits")
    run_cli("mask", "--quiet", "--nside", 32, "--latitude-cut", 25, "--output", d / "mask2.fits")
    run_cli("model", "--quiet", "--lmax", 200, "--output", d / "model.txt")
    sigma = 40 / 60 * math.pi / 180 / math.sqrt(8 * math.log(2))
    (d / "beam.txt").write_text("".join(f"{l} {math.exp(-0.5 * l * (l + 1) * sigma ** 2)!r}\n"
                                        for l in range(120)))
    (d / "transfer.txt").write_text("".join(f"{l} {1 - 0.001 * l!r}\n" for l in range(200)))
    (d / "noise.txt").write_text("# columns: l C_l\n" + "".join(f"{l} 1e-4\n" for l in range(96)))
    (d / "all.yaml").write_text(FIELDS)
    (d / "chosen.yaml").write_text(FIELDS + SETTINGS)
    return d


def close(a, b):
    a, b = np.asarray(a, dtype=np.float64), np.asarray(b, dtype=np.float64)
    assert a.shape == b.shape
    scale = np.maximum(np.abs(b), np.max(np.abs(b)) * 1e-3) if b.size else b
    assert np.all(np.abs(a - b) <= 1e-12 * scale), np.max(np.abs(a - b))


@pytest.mark.parametrize("name", ["all", "chosen"])
def test_same_as_cli(runs, tmp_path, name):
    out = tmp_path / "out"
    run_cli("spectrum", "--run", runs / f"{name}.yaml", "--no-cache", "--quiet", "-o", out)
    j = json.load(open(f"{out}.json"))
    r = clef.spectrum_run(runs / f"{name}.yaml", cache=False)
    assert list(r["pairs"]) == [p["name"] for p in j["pairs"]]
    assert r["summary"]["warnings"] == j["warnings"]
    assert r["summary"]["nbins"] == j["nbins"] and r["summary"]["lmax"] == j["lmax"]
    assert r["summary"]["map_transforms"] == j["map_transforms"]
    with fits.open(f"{out}.fits") as h:
        for k, (pname, p) in enumerate(r["pairs"].items()):
            bp = h[1 + 3 * k].data
            assert h[1 + 3 * k].header["PAIR"] == pname
            assert list(p["l_lo"]) == list(bp["LMIN"]) and list(p["l_hi"]) == list(bp["LMAX"])
            for col, key in (("LEFF", "l_eff"), ("D_BAND", "dl"), ("D_SIGMA", "dl_err"),
                             ("C_BAND", "cl")):
                close(p[key], bp[col])
            close(p["cov"], h[2 + 3 * k].data)
            close(p["windows"], h[3 + 3 * k].data)
            jp = j["pairs"][k]
            assert (p["field1"], p["field2"]) == (jp["field1"], jp["field2"])
            close(p["summary"]["rcond"], jp["coupling_rcond"])
        close(r["cov"], h["JOINTCOV"].data)
    if name == "chosen":  # joint-covariance: false leaves the cross-pair blocks 0
        n = r["summary"]["nbins"]
        assert not r["cov"][:n, n:].any() and r["summary"]["joint"] is False
    else:
        assert r["cov"][:r["summary"]["nbins"], r["summary"]["nbins"]:].any()


def test_estimator_arrays(runs):
    """The Estimator on arrays gives what the run file gives (same inputs)."""
    rf = clef.spectrum_run(runs / "all.yaml", cache=False, peak=False)
    s1, m1 = clef.read_map(runs / "sky_split1.fits")
    s2, _ = clef.read_map(runs / "sky_split2.fits")
    o, mo = clef.read_map(runs / "other.fits")
    mask, _ = clef.read_map(runs / "mask.fits")
    mask2, _ = clef.read_map(runs / "mask2.fits")
    lread = 3 * 32 - 1
    e = clef.Estimator(cache=False, peak=False)
    e.add_field("a", np.stack([s1, s2]), mask, beam_fwhm=30.0, unit=m1["unit"])
    e.add_field("b", s1, mask, beam_fwhm=30.0, noise_cl=np.full(96, 1e-4), unit=m1["unit"])
    e.add_field("c", [o], mask2, beam=clef.read_beam(runs / "beam.txt", 119),
                transfer=clef.read_beam(runs / "transfer.txt", lread), unit=mo["unit"])
    assert e.field_names == ("a", "b", "c") and e.nfields == 3 and not e.computed
    r = e.compute()
    assert e.computed and r["summary"]["npairs"] == 6
    for k in rf["pairs"]:
        close(r["pairs"][k]["dl"], rf["pairs"][k]["dl"])
    close(r["cov"], rf["cov"])
    assert e.compute()["pairs"].keys() == r["pairs"].keys()  # results kept, not recomputed
    with pytest.raises(RuntimeError, match="after compute"):
        e.add_field("d", s1, mask)


def test_maps_from_files(runs, tmp_path):
    """Maps given as files are read when compute() transforms them (as
    `clef spectrum --run`, which clef.spectrum_run now matches this way),
    not when the field is added: the same numbers as the arrays, bit for
    bit; a file rewritten after add_field gives the new map's spectra; one
    removed after add_field fails in compute() naming the file, and
    load_failed names the field and split."""
    import shutil
    mask, _ = clef.read_map(runs / "mask.fits")
    s1, m1 = clef.read_map(runs / "sky_split1.fits")
    s2, _ = clef.read_map(runs / "sky_split2.fits")
    o, mo = clef.read_map(runs / "other.fits")

    def arrays(x, y):
        e = clef.Estimator(cache=False, peak=False)
        e.add_field("a", np.stack([x, y]), mask, unit=m1["unit"], coordsys=m1["coordsys"])
        return e.compute()

    ref = arrays(s1, s2)
    e = clef.Estimator(cache=False, peak=False)
    e.add_field("a", [runs / "sky_split1.fits", str(runs / "sky_split2.fits")], mask,
                mask_coordsys=m1["coordsys"])
    r = e.compute()
    assert e.load_failed is None
    assert np.array_equal(r["cov"], ref["cov"])
    assert np.array_equal(r["pairs"]["a x a"]["dl"], ref["pairs"]["a x a"]["dl"])
    # Read at compute(): split 2 replaced by another sky after add_field.
    shutil.copy(runs / "sky_split1.fits", tmp_path / "s1.fits")
    shutil.copy(runs / "sky_split2.fits", tmp_path / "s2.fits")
    e = clef.Estimator(cache=False, peak=False)
    e.add_field("a", [tmp_path / "s1.fits", tmp_path / "s2.fits"], mask,
                mask_coordsys=m1["coordsys"])
    shutil.copy(runs / "other.fits", tmp_path / "s2.fits")
    r = e.compute()
    new = arrays(s1, o)
    assert np.array_equal(r["pairs"]["a x a"]["dl"], new["pairs"]["a x a"]["dl"])
    assert not np.array_equal(new["pairs"]["a x a"]["dl"], ref["pairs"]["a x a"]["dl"])
    # Removed after add_field (its header was read then).
    e = clef.Estimator(cache=False, peak=False)
    e.add_field("a", [tmp_path / "s1.fits", tmp_path / "s2.fits"], mask)
    (tmp_path / "s2.fits").unlink()
    with pytest.raises(clef.FileError, match="s2.fits"):
        e.compute()
    assert e.load_failed == ("a", 1)
    with pytest.raises(clef.FileError, match="gone.fits"):
        clef.Estimator().add_field("a", tmp_path / "gone.fits", mask)
    with pytest.raises(TypeError, match="all arrays or all files"):
        clef.Estimator().add_field("a", [s1, tmp_path / "s1.fits"], mask)


def test_bad_input(runs, tmp_path):
    s1, _ = clef.read_map(runs / "sky_split1.fits")
    mask, _ = clef.read_map(runs / "mask.fits")
    e = clef.Estimator()
    with pytest.raises(ValueError, match="no field added"):
        e.compute()
    with pytest.raises(ValueError, match="no field added yet"):
        e.add_pair("a", "a")
    with pytest.raises(ValueError, match="9 maps"):
        e.add_field("a", [s1] * 9, mask)
    with pytest.raises(TypeError, match="float64"):
        e.add_field("a", s1.astype(np.float32), mask)
    with pytest.raises(ValueError, match="NaN"):
        e.add_field("a", s1, np.where(mask > 0.5, mask, np.nan))
    with pytest.raises(ValueError, match="field name"):
        e.add_field("", s1, mask)
    with pytest.raises(ValueError, match="beam_fwhm"):
        e.add_field("a", s1, mask, beam_fwhm=-1.0)
    e.add_field("a", s1, mask)
    with pytest.raises(clef.InvalidArgumentError, match="a"):
        e.add_field("a", s1, mask)  # a duplicated name (estimator.h)
    with pytest.raises(clef.InvalidArgumentError, match="z"):
        e.add_pair("a", "z")
    with pytest.raises(ValueError, match="lmax"):
        clef.Estimator(lmax=1)
    with pytest.raises(ValueError, match="iterations"):
        clef.Estimator(iterations=30)
    with pytest.raises(TypeError):
        clef.Estimator(bin_with=3)
    with pytest.raises(ValueError, match="one of bins and bin_width"):
        clef.Estimator(bins=[[2, 10]], bin_width=3)
    with pytest.raises(clef.FileError, match="nope.yaml"):
        clef.spectrum_run(tmp_path / "nope.yaml")
    (tmp_path / "bad.yaml").write_text("fields:\n  - name: a\n    mask2: m.fits\n")
    with pytest.raises(clef.InvalidArgumentError, match="line 3.*mask2"):
        clef.run_read(tmp_path / "bad.yaml")
    (tmp_path / "miss.yaml").write_text(FIELDS.replace("other.fits", "gone.fits"))
    for f in ("sky_split1.fits", "sky_split2.fits", "mask.fits", "mask2.fits", "noise.txt",
              "beam.txt", "transfer.txt"):
        (tmp_path / f).symlink_to(runs / f)
    with pytest.raises(clef.FileError, match=r"line 12: field 'c' key 'maps'.*gone.fits"):
        clef.spectrum_run(tmp_path / "miss.yaml")


def test_run_read(runs):
    r = clef.run_read(runs / "chosen.yaml")
    assert [f["name"] for f in r["fields"]] == ["a", "b", "c"]
    assert r["fields"][0]["maps"] == [str(runs / "sky_split1.fits"), str(runs / "sky_split2.fits")]
    assert r["pairs"] == [("c", "a"), ("b", "b"), ("b", "c")]
    assert (r["lmax"], r["bin_width"], r["iterations"], r["pixel_window"], r["joint"]) == \
        (60, 12, 2, 0, 0)
    assert r["keep_multipoles"] is True and r["covariance_model"] == str(runs / "model.txt")
    assert clef.run_read(runs / "all.yaml")["pairs"] is None

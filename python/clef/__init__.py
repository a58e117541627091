"""clef: HEALPix sky maps to angular power spectra, from Python.

A thin layer over the clef C library (docs/python.md): numpy float64 maps in
RING order (NaN marks a missing pixel), complex128 a_lm in clef's m-major
layout, results as numpy arrays and dicts.  The library does the work; its
errors are raised as clef.Error subclasses carrying its message and status
code, and its messages go to the logging logger "clef" (silent unless the
application configures logging).
"""
import logging as _logging

from ._clef import *  # noqa: F401,F403  (the C extension: every function and class)
from ._clef import __version__  # noqa: F401

# A library must not print: without this handler Python's last-resort
# handler would write the logger's warnings to stderr.
_logging.getLogger("clef").addHandler(_logging.NullHandler())

import math as _math
from typing import Optional as _Optional

import numpy as _np

from . import _clef

_DEG = _math.pi / 180.0


def build_mask(nside: _Optional[int] = None, *, from_map=None,
               threshold: _Optional[float] = None, patch=None,
               latitude_cut: _Optional[float] = None, holes=None,
               taper: _Optional[str] = None, taper_width: _Optional[float] = None,
               erode: float = 0.0) -> "_np.ndarray":
    """A mask as `clef mask` builds it, in the same order and units (degrees).

    Start from an all-observed mask of `nside`, or from the map `from_map`
    (a float64 RING array: observed where the value is > 0, or >= threshold
    when one is given; NaN pixels are unobserved); then keep only the disc
    `patch` = (lon, lat, radius) [deg]; mask |latitude| < `latitude_cut`
    [deg]; cut `holes` (a source-list path, or an (n, 3) array of lon [deg],
    lat [deg], radius [arcmin]); finally taper: `taper` 'c1', 'c2' or
    'gauss' with `taper_width` [deg] (apodization length, or FWHM for
    gauss) and `erode` [deg] (gauss only).  Returns a float64 RING array.
    """
    if (nside is None) == (from_map is None):
        raise ValueError("give exactly one of nside and from_map")
    if from_map is not None:
        m = _clef.mask_binarize(from_map, threshold=0.0 if threshold is None else float(threshold),
                                inclusive=threshold is not None)
    else:
        m = _clef.mask_full(nside)
    if patch is not None:
        lon, lat, r = patch
        m = _clef.mask_keep_disc(m, lon * _DEG, lat * _DEG, r * _DEG)
    if latitude_cut is not None:
        m = _clef.mask_cut_latitude(m, latitude_cut * _DEG)
    if holes is not None:
        if isinstance(holes, (str, bytes)) or hasattr(holes, "__fspath__"):
            h = _clef.mask_holes_read(holes)
        else:
            h = _np.array(holes, dtype=_np.float64, ndmin=2)
            if h.shape[1:] != (3,):
                raise ValueError("holes must be an (n, 3) array: lon [deg], lat [deg], "
                                 "radius [arcmin]")
            h = _np.ascontiguousarray(h * [_DEG, _DEG, _DEG / 60.0])
        m = _clef.mask_cut_holes(m, h)
    if taper is not None:
        if taper_width is None:
            raise ValueError("taper needs taper_width [deg]")
        m = _clef.mask_apodize(m, taper, taper_width * _DEG, erode=erode * _DEG)
    elif taper_width is not None:
        raise ValueError("taper_width given without taper ('c1', 'c2' or 'gauss')")
    return m


def _cosmo(quantity, doc):
    def f(z: float, **params: float) -> float:
        return _clef.cosmo_eval(quantity, float(z), **params)
    f.__name__ = quantity
    f.__qualname__ = quantity
    f.__doc__ = doc + "\n\nParameters: keywords of clef.cosmo_params (default Planck 2018)."
    return f


hubble = _cosmo("hubble", "H(z) in km/s/Mpc.")
baryon_loading = _cosmo("baryon_loading", "Baryon loading R(z) = 3 rho_b / (4 rho_gamma).")
sound_speed = _cosmo("sound_speed", "Photon-baryon sound speed at z, in units of c.")
sound_horizon = _cosmo("sound_horizon", "Comoving sound horizon r_s(z) [Mpc].")
comoving_distance = _cosmo("comoving_distance", "Line-of-sight comoving distance chi(z) [Mpc].")
transverse_distance = _cosmo("transverse_distance", "Transverse comoving distance D_M(z) [Mpc].")
conformal_time = _cosmo("conformal_time", "Conformal time eta(z) times c [Mpc].")
damping_scale = _cosmo("damping_scale", "Photon-diffusion damping wavenumber k_D(z) [1/Mpc].")


def zstar(**params: float) -> float:
    """Last-scattering redshift z_* (Hu & Sugiyama 1996, eq. E1).

    Parameters: keywords of clef.cosmo_params (default Planck 2018)."""
    return _clef.cosmo_eval("zstar", 0.0, **params)


def _table_last_l(path) -> int:
    """The last multipole of an l-indexed table, as `clef spectrum` finds it
    (src/cli/cli_analysis.c cli_table_last_l): the spectrum reader's own end
    when it reads the file, else the largest integer starting a line of
    text ('#' comments), -1 if none."""
    try:
        return len(_clef.read_cl(path)) - 1
    except (Error, ValueError):
        pass
    best = -1
    try:
        with open(path, "rb") as f:
            for line in f:
                tok = line.lstrip(b" \t")
                if not tok or tok[:1] in (b"#", b"\n"):
                    continue
                digits = len(tok) - len(tok.lstrip(b"+-")) if tok[:1] in (b"+", b"-") else 0
                j = digits
                while j < len(tok) and tok[j:j + 1].isdigit():
                    j += 1
                if j > digits:
                    val = int(tok[:j])
                    if best < val < 1000000:
                        best = val
    except OSError:
        return -1
    return best


def _run_error(run, f, line, key, exc):
    """A library error while reading a run file's input, re-raised with the
    run file, line, field and key in front (as `clef spectrum --run`)."""
    msg = f"{run['path']} line {line}: field '{f['name']}' key '{key}': " + \
        getattr(exc, "message", str(exc))
    err = type(exc)(msg)
    if isinstance(exc, Error):
        err.status, err.message = exc.status, msg
    return err


def spectrum_run(path, *, cache: bool = True, cache_dir: _Optional[str] = None,
                 peak: bool = True) -> dict:
    """Every spectrum of a YAML run file (docs/run-files.md), as
    `clef spectrum --run FILE` computes it: the run file's fields, pairs and
    settings (read by clef.run_read), each field's maps, mask, beam table,
    transfer function and noise spectrum read as the command reads them,
    then clef.Estimator.  cache, cache_dir, peak: the command's --no-cache,
    --cache-dir and --no-peak.  Returns the dict of Estimator.compute() with
    run (the run_read dict) added.  Errors reading an input name the run
    file's line, the field and the key."""
    run = _clef.run_read(path)
    kw = dict(lmax=run["lmax"], bin_width=run["bin_width"], keep_multipoles=run["keep_multipoles"],
              joint=run["joint"] != 0, cache=cache, cache_dir=cache_dir, peak=peak,
              pixel_window=run["pixel_window"] != 0)
    if run["iterations"] >= 0:
        kw["iterations"] = run["iterations"]
    # The maps' headers now (nside, errors naming the run file's line); the
    # pixels are read by the estimator one map at a time, when it transforms
    # each (as the command: N fields never hold N maps).
    masks, nside, read_masks = [], None, {}
    for f in run["fields"]:
        for p in f["maps"]:
            try:
                ns = _clef.read_map_header(p)["nside"]
            except Error as e:
                raise _run_error(run, f, f["maps_line"], "maps", e) from None
            if nside is None:
                nside = ns
            elif ns != nside:
                raise _run_error(run, f, f["maps_line"], "maps", InvalidArgumentError(
                    f"map '{p}' has nside {ns}, the first field's maps nside {nside}: every "
                    "field must be on one grid"))
        mask = read_masks.get(f["mask"])  # a mask named by several fields is read once
        if mask is None:
            try:
                mask = read_masks[f["mask"]] = _clef.read_map(f["mask"])
            except Error as e:
                raise _run_error(run, f, f["line"], "mask", e) from None
        if mask[1]["nside"] != nside:
            raise _run_error(run, f, f["line"], "mask", InvalidArgumentError(
                f"mask '{f['mask']}' has nside {mask[1]['nside']}, the maps nside {nside}"))
        masks.append(mask)
    lread = 3 * nside - 1
    if run["covariance_model"]:
        model = _clef.read_cl(run["covariance_model"], lmax=lread)
        last = _table_last_l(run["covariance_model"])
        kw["theory_cl"] = model[:(last if 0 <= last < lread else lread) + 1]
    est = _clef.Estimator(**kw)

    def table(f, key, reader):
        p = f[key]
        if p is None:
            return None
        last = _table_last_l(p)
        try:
            return reader(p, last if 2 <= last < lread else lread)
        except Error as e:
            raise _run_error(run, f, f["line"], {"beam_table": "beam-table",
                                                 "noise_spectrum": "noise-spectrum"}.get(key, key),
                             e) from None

    for f, mask in zip(run["fields"], masks):
        pix = mask[0]
        if _np.isnan(pix).any():  # a pixel missing from the mask file is unobserved
            pix = _np.where(_np.isnan(pix), 0.0, pix)
        # The map files themselves: read by the estimator (every nside was
        # checked above).
        est.add_field(f["name"], list(f["maps"]), pix, beam_fwhm=f["beam_fwhm"],
                      beam=table(f, "beam_table", _clef.read_beam),
                      transfer=table(f, "transfer", _clef.read_beam),
                      noise_cl=table(f, "noise_spectrum", lambda p, l: _clef.read_cl(p, lmax=l)),
                      mask_coordsys=mask[1]["coordsys"])
    for a, b in run["pairs"] or ():
        est.add_pair(a, b)
    try:
        out = est.compute()
    except Error as e:
        if est.load_failed is None:
            raise
        f = next(f for f in run["fields"] if f["name"] == est.load_failed[0])
        raise _run_error(run, f, f["maps_line"], "maps", e) from None
    out["run"] = run
    return out

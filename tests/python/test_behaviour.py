"""What a Python user expects of the module: the library's messages go to
the logging logger "clef" and nothing is printed unless asked; errors carry
the library's status and message; the GIL is released while the library
computes; no memory is lost over 1000 create/destroy cycles."""
import json
import logging
import os
import subprocess
import sys
import threading

import numpy as np
import pytest

import clef
from conftest import longest_pause, timed_plan


def test_error_hierarchy():
    assert issubclass(clef.InvalidArgumentError, clef.Error)
    assert issubclass(clef.InvalidArgumentError, ValueError)
    assert issubclass(clef.FileError, OSError)
    assert issubclass(clef.NumericalError, ArithmeticError)
    with pytest.raises(clef.InvalidArgumentError) as e:
        clef.Sht(16, 8, mmax=4, nmaps=1).ring_info(999)
    assert e.value.status == 1 and e.value.message and str(e.value) == e.value.message
    assert clef.strerror(3)


def test_log_goes_to_logging(caplog):
    m = clef.mask_full(8)
    with caplog.at_level(logging.WARNING, logger="clef"):
        clef.Sht(8, 30)  # lmax above 3 nside - 1: the library warns
    assert any(r.name == "clef" and r.levelno == logging.WARNING and "not invertible" in r.message
               for r in caplog.records), caplog.records
    caplog.clear()
    with caplog.at_level(logging.ERROR, logger="clef"):
        clef.Sht(8, 30)
    assert not caplog.records
    assert clef.mask_moments(m)["fsky"] == 1.0


def test_nothing_printed(tmp_path):
    # A warning from the library, an error raised: neither is printed.
    code = ("import clef\n"
            "clef.Sht(8, 30)\n"
            "try:\n    clef.read_map('/nonexistent.fits')\nexcept clef.FileError:\n    pass\n")
    p = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                       env=dict(os.environ))
    assert p.returncode == 0, p.stderr
    assert p.stdout == "" and p.stderr == ""
    # ... unless asked: logging configured by the application.
    p = subprocess.run([sys.executable, "-c", "import logging; logging.basicConfig()\n" + code],
                       capture_output=True, text=True)
    assert "WARNING:clef:" in p.stderr and "not invertible" in p.stderr


def test_gil_released():
    # While a transform runs in one thread, the main thread keeps running
    # Python code: the longest pause it sees is far below the call's length.
    plan, single = timed_plan(lambda n: clef.Sht(n, 3 * n - 1),
                              lambda p: p.analysis(np.zeros(p.npix), iterations=4))
    m = np.random.default_rng(0).normal(size=plan.npix)
    gap, took = longest_pause(lambda: plan.analysis(m, iterations=4))
    assert gap < 0.5 * took, (gap, took, single)


def test_plan_used_from_two_threads():
    # One plan, two threads: calls wait for each other (sht.h forbids
    # concurrent transforms on a plan) and give the same result.
    plan = clef.Sht(32, 64)
    m = np.random.default_rng(1).normal(size=plan.npix)
    want = plan.analysis(m)
    out = [None, None]

    def work(i):
        out[i] = plan.analysis(m)

    ts = [threading.Thread(target=work, args=(i,)) for i in range(2)]
    for t in ts:
        t.start()
    for t in ts:
        t.join()
    assert np.array_equal(out[0], want) and np.array_equal(out[1], want)


def test_no_leaks(sky):
    # tests/python/leakcheck.py in its own process: 1000 cycles of plans,
    # maps, masks, simulations, spectra (with peak) and raised errors.
    env = dict(os.environ, OMP_NUM_THREADS="1")
    p = subprocess.run([sys.executable, os.path.join(os.path.dirname(__file__), "leakcheck.py"),
                        str(sky / "mask.fits")], capture_output=True, text=True, env=env)
    assert p.returncode == 0, p.stderr
    r = json.loads(p.stdout)
    assert r["cycles"] == 1000
    # One lost result array, plan or message per cycle would be >= 100
    # bytes x 1000; the noise of the allocators is a few kB.
    assert r["heap_bytes"] < 64_000, r
    assert r["traced_bytes"] < 64_000, r
    assert r["rss_kib"] < 2048, r


def test_stubs_and_signatures():
    # The type stubs name exactly what the extension offers, and every
    # function has a signature Python can read (keyword names, defaults).
    import ast
    import inspect

    from clef import _clef
    stub = ast.parse(open(os.path.join(os.path.dirname(clef.__file__), "_clef.pyi")).read())
    names = {n.name for n in stub.body if isinstance(n, (ast.FunctionDef, ast.ClassDef))}
    public = {n for n in dir(_clef) if not n.startswith("_") and n != "NSIDE_MAX"}
    assert names == public, (names ^ public)
    sig = inspect.signature(clef.spectrum)
    assert sig.parameters["iterations"].default == 1
    assert sig.parameters["peak_l_max"].default == 400.0
    assert inspect.signature(clef.Sht.analysis).parameters["iterations"].default == 3

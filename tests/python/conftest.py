"""Shared fixtures of the Python module tests (tests/cli/python.sh runs them
with /usr/bin/python3 -m pytest and PYTHONPATH at build/python)."""
import os
import subprocess
import threading
import time

import pytest

TOP = os.environ.get("CLEF_TOP", os.path.join(os.path.dirname(__file__), "..", ".."))
CLEF_BIN = os.environ.get("CLEF_BIN", os.path.join(TOP, "build", "clef"))


def run_cli(*args):
    """Run the command-line tool; returns its stdout, fails the test on a
    non-zero exit."""
    p = subprocess.run([CLEF_BIN, *map(str, args)], capture_output=True, text=True)
    assert p.returncode == 0, f"clef {' '.join(map(str, args))}: exit {p.returncode}: {p.stderr}"
    return p.stdout


@pytest.fixture(scope="session")
def sky(tmp_path_factory):
    """Two noise splits of one simulated sky at nside 64 (30-arcmin beam,
    30 uK-arcmin noise) and a tapered latitude-cut mask, made by the CLI."""
    d = tmp_path_factory.mktemp("sky")
    run_cli("simulate", "--quiet", "--nside", 64, "--model", "--seed", 3, "--beam-fwhm", 30,
            "--noise-depth", 30, "--splits", 2, "--coordsys", "G", "--output", d / "sky.fits")
    run_cli("mask", "--quiet", "--nside", 64, "--latitude-cut", 15, "--taper", "c2",
            "--taper-width", 5, "--coordsys", "G", "--output", d / "mask.fits")
    return d


@pytest.fixture(autouse=True)
def _cache(tmp_path, monkeypatch):
    """Every test has its own coupling cache folder."""
    monkeypatch.setenv("CLEF_CACHE_DIR", str(tmp_path / "cache"))


def timed_plan(make, run, sizes=(128, 256, 512, 1024), at_least=0.1):
    """A plan of the first nside in `sizes` whose call `run(plan)` takes at
    least `at_least` seconds (sized by measurement, so a fast CPU cannot
    make a GIL check meaningless); returns (plan, seconds of one call).
    The call is timed the second time: the first one on a new plan is
    slower (first touch of its scratch), which would flatter the check."""
    for nside in sizes:
        plan = make(nside)
        run(plan)
        t0 = time.perf_counter()
        run(plan)
        single = time.perf_counter() - t0
        if single >= at_least:
            break
    assert single >= at_least, f"call too quick to tell even at nside {sizes[-1]}"
    return plan, single


def longest_pause(work):
    """Run work() in a thread while this thread keeps running Python code;
    returns (the longest pause this thread saw, seconds work() took in its
    thread).  The pause is short when work() releases the GIL, and about
    as long as work() when it does not (the same call, so a loaded machine
    cannot blur the comparison)."""
    done = threading.Event()
    took = []

    def target():
        t0 = time.perf_counter()
        work()
        took.append(time.perf_counter() - t0)
        done.set()

    th = threading.Thread(target=target)
    last = time.perf_counter()
    gap = 0.0
    th.start()
    while not done.is_set():
        now = time.perf_counter()
        gap = max(gap, now - last)
        last = now
    th.join()
    return gap, took[0]

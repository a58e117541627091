"""Shared fixtures of the Python module tests (tests/cli/python.sh runs them
with /usr/bin/python3 -m pytest and PYTHONPATH at build/python)."""
import os
import subprocess

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

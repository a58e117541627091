"""Memory over 1000 create/destroy cycles of every kind of object the
module makes (polarization included), run by test_behaviour.py in its own process with one OpenMP
thread (the tiny transforms here would otherwise spend their time in
OpenMP barriers on a loaded machine; results do not depend on the thread
count).  Prints one JSON object: growth of the C heap (glibc mallinfo2:
bytes in use, arena and mmap), of Python's traced memory (tracemalloc,
which also sees numpy's buffers) and of the resident set (/proc)."""
import ctypes
import gc
import json
import sys
import tracemalloc

import numpy as np

import clef


class _MallInfo2(ctypes.Structure):
    _fields_ = [(n, ctypes.c_size_t) for n in ("arena", "ordblks", "smblks", "hblks", "hblkhd",
                                               "usmblks", "fsmblks", "uordblks", "fordblks",
                                               "keepcost")]


_libc = ctypes.CDLL(None)
_libc.mallinfo2.restype = _MallInfo2


def heap():
    i = _libc.mallinfo2()
    return i.uordblks + i.hblkhd


def rss_kib():
    with open("/proc/self/status") as f:
        for line in f:
            if line.startswith("VmRSS:"):
                return int(line.split()[1])
    raise RuntimeError("no VmRSS")


def main(mask_path, n=1000):
    import os
    run_path = os.path.join(os.path.dirname(mask_path), "leak-run.yaml")
    with open(run_path, "w") as f:
        f.write(f"fields:\n  - name: a\n    maps: {os.path.basename(mask_path)}\n"
                f"    mask: {os.path.basename(mask_path)}\n")
    small = clef.mask_full(8)
    cut = clef.mask_cut_latitude(small, 0.2)
    sky = clef.simulate(8, clef.theory_cl(lmax=23), seed=2)
    cl = clef.theory_cl(lmax=30)
    table = {"l_lo": [2], "l_hi": [10], "l_eff": [6.0], "dl": [1.0], "dl_err": [0.1]}
    # polarization: TT, EE, BB, TE; a T/Q/U sky with a pixel missing in U
    # only (the wrapper's joined Q/U validity copies the maps)
    cl4 = np.array([cl, 0.05 * cl, 0.001 * cl, 0.1 * cl])
    tqu = clef.simulate_pol(8, cl4, seed=2, lmax=23)
    tqu[2, 7] = np.nan
    pol_path = os.path.join(os.path.dirname(mask_path), "leak-tqu.fits")
    pol_out = os.path.join(os.path.dirname(mask_path), "leak-tqu-out.fits")
    clef.write_map_pol(pol_path, tqu, unit="uK")
    bad_te = cl4.copy()
    bad_te[3, 5] = 10 * cl4[0, 5]
    gplan = clef.GeometryPlan(nsamples=50, ngrid=101, nnodes=5)
    bad_calls = (lambda: clef.read_map("/nonexistent.fits"),
                 lambda: clef.spectrum(small, small, lmax=1),
                 lambda: clef.spectrum(sky, cut * 2),
                 lambda: clef.peak_find(table),
                 lambda: clef.Sht(3, 8),
                 lambda: clef.theory_cl(h=-1.0),
                 lambda: clef.Estimator(lmax=1),
                 lambda: clef.Estimator().add_field("a", sky, cut * 2),
                 lambda: clef.run_read("/nonexistent.yaml"),
                 lambda: clef.read_map_pol(mask_path),  # no Q column
                 lambda: clef.read_map_pol(pol_path, polcconv="SOUTH"),
                 lambda: clef.ShtSpin(8, 1),
                 lambda: clef.ShtSpin(8, 16).analysis(small, small[:-1]),
                 lambda: clef.simulate_pol(8, bad_te, lmax=16),
                 lambda: clef.spectrum_pol(tqu, cut * 2),
                 lambda: clef.spectrum_pol(tqu, cut, pol_noise_cl=cl[:5]),
                 lambda: clef.write_map_pol(pol_out, [small, small]),
                 lambda: clef.GeometryPlan(ngrid=1),
                 lambda: gplan.execute(220.0, -1.0))

    def cycle(i):
        p = clef.Sht(8, 16)
        p.synthesis(p.analysis(small, iterations=0))
        del p
        clef.read_map(mask_path)
        clef.mask_moments(cut)
        clef.simulate(8, cl, seed=i, lmax=16)
        clef.mask_apodize(cut, "c1", 0.3)
        clef.spectrum(sky, cut, bin_width=4)
        e = clef.Estimator(bin_width=4, theory_cl=cl, peak=False)
        e.add_field("a", [sky, sky], cut, beam=cl[:20] * 0 + 1)
        e.add_field("b", sky, small, noise_cl=cl)
        e.add_pair("a", "b")
        e.compute()
        del e
        clef.run_read(run_path)
        sp = clef.ShtSpin(8, 16, nmaps=2)
        sp.synthesis(*sp.analysis(np.array([small, cut]), np.array([cut, small]), iterations=1))
        del sp
        clef.read_map_pol(pol_path)
        clef.write_map_pol(pol_out, tqu)
        clef.sim_alm_pol(cl4, seed=i, lmax=16)
        clef.simulate_pol(8, cl4, seed=i, lmax=16, noise_depth=10.0, return_alm=True)
        # a pair with a polarization mask; its noise spectrum is ignored with
        # a warning (spectrum.h), which the summary's list carries
        clef.spectrum_pol(tqu, cut, tqu, pol_mask=small, bin_width=4, pol_noise_cl=cl)
        g = clef.GeometryPlan(nsamples=50, ngrid=101, nnodes=5)
        g.execute(220.0 + i % 7, 3.0)
        del g
        for bad in bad_calls:
            try:
                bad()
            except (clef.Error, ValueError):
                pass

    for i in range(100):  # warm up: caches, free lists, first-use allocations
        cycle(i)
    tracemalloc.start()
    for i in range(300):  # tracemalloc's own tables and one-time buffers grow here
        cycle(i)
    gc.collect()
    h0, t0, r0 = heap(), tracemalloc.get_traced_memory()[0], rss_kib()
    for i in range(n):
        cycle(i)
    gc.collect()
    h1, t1, r1 = heap(), tracemalloc.get_traced_memory()[0], rss_kib()
    tracemalloc.stop()
    print(json.dumps({"cycles": n, "heap_bytes": h1 - h0, "traced_bytes": t1 - t0,
                      "rss_kib": r1 - r0}))


if __name__ == "__main__":
    main(sys.argv[1], int(sys.argv[2]) if len(sys.argv) > 2 else 1000)

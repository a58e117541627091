# Masked ensemble of polarized cross-spectra of two instruments (a 60' and a
# 150' beam on one sky, independent white noise): every spectrum's mean
# against the input through its windows (and the E/B leakage windows), and
# the quoted errors against the scatter.  Not part of make check (a few
# minutes).  Run from the top of the tree after `make python`:
#   OMP_NUM_THREADS=1 /usr/bin/python3 tests/diag/pol_two_instruments.py SKIES BIN_WIDTH LMAX
# e.g. 60 8 64 and 60 16 48 (docs/method.md section 9 quotes the results).
# Input spectra: TT of clef's analytic model, EE, BB, TE shapes chosen here.
import sys, numpy as np
sys.path.insert(0, 'build/python'); import clef
ns = 32; lmax = 95; l = np.arange(lmax + 1)
tt = clef.theory_cl(lmax=lmax); ee = 0.04*tt*(1+l/50.0); bb = 0.3*ee; te = 0.5*np.sqrt(tt*ee)*np.cos(l/30.0)
cl4 = np.array([tt, ee, bb, te])
w = clef.mask_apodize(clef.mask_cut_latitude(clef.mask_full(ns), np.radians(20)), "c2", np.radians(10))
rng = np.random.default_rng(4)
N = int(sys.argv[1]); bw = int(sys.argv[2])
dl = l*(l+1)/(2*np.pi)
inp = {"TT": tt, "EE": ee, "BB": bb, "TE": te, "TB": 0*l, "EB": 0*l}
vals = {k: [] for k in inp}; errs = {k: [] for k in inp}
for s in range(N):
    m1 = clef.simulate_pol(ns, cl4, seed=500+s, beam_fwhm=60.0)
    m2 = clef.simulate_pol(ns, cl4, seed=500+s, beam_fwhm=150.0)
    m1 = m1 + rng.normal(0, 2.0, m1.shape); m2 = m2 + rng.normal(0, 2.0, m2.shape)
    r = clef.spectrum_pol(m1, w, m2, beam_fwhm=60.0, second_beam_fwhm=150.0, bin_width=bw, lmax=int(sys.argv[3]), cache=False)
    for k in inp:
        vals[k].append(r[k]["dl"]); errs[k].append(r[k]["dl_err"])
for k in inp:
    W = r[k]["windows"]; n = W.shape[1]
    exp = W @ (dl[:n]*inp[k][:n])
    if k == "BB": exp = exp + r["leakage"]["EE_to_BB"] @ (dl[:n]*ee[:n])
    if k == "EE": exp = exp + r["leakage"]["BB_to_EE"] @ (dl[:n]*bb[:n])
    v = np.array(vals[k]); sd = v.std(0, ddof=1)
    z = (v.mean(0)-exp)/(sd/np.sqrt(N)); q = np.mean(errs[k], 0)/sd
    print(k, "z", np.round(z, 2), "err/scatter rms %.3f" % np.sqrt(np.mean(q**2)))

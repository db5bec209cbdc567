"""Accuracy and speed of cmbtools' HEALPix pixel window (cmbtools.spectrum.pixel_windows).

Three measurements, printed as tables:

1. Time of a first computation (no cache) for several nside.
2. Convergence: the default rule (Gauss-Legendre order 5 per pixel side,
   1024 * max(4, lmax/nside) histogram bins per unit of chord x nside, pole
   refinement 10 levels) against a refined one (order 8 for lmax <= 4 nside
   or 12 beyond, twice the bins, 16 levels).  The difference bounds the error
   of the default rule.
3. An independent path for nside 1 and 2: the definition integrated by the
   midpoint rule on healpy sub-pixel centres with scipy's Y_lm, with one
   Richardson step in the sub-pixel size.

Usage::

    python scripts/pixwin_accuracy.py                 # nside up to 2048, 2 threads
    python scripts/pixwin_accuracy.py --nside-max 512 --threads 1
"""

from __future__ import annotations

import argparse
import time

import healpy as hp
import numpy as np
from scipy.special import sph_harm_y

from cmbtools.spectrum import pixel_windows as _pixwin


def _direct_window_squared(nside, k, lmax):
    nh = nside * k
    theta, phi = hp.pix2ang(nh, np.arange(12 * nh * nh), nest=True)
    out = np.zeros(lmax + 1)
    for ell in range(lmax + 1):
        total = 0.0
        for m in range(ell + 1):
            avg = sph_harm_y(ell, m, theta, phi).reshape(-1, k * k).mean(axis=1)
            total += (1.0 if m == 0 else 2.0) * np.sum(np.abs(avg) ** 2)
        out[ell] = 4.0 * np.pi / (2 * ell + 1) * total / (12 * nside * nside)
    return out


def _relative(a_sq, b_sq):
    return np.abs(np.sqrt(a_sq / b_sq) - 1.0)


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--nside-max", type=int, default=2048, help="largest nside timed (default 2048)")
    parser.add_argument("--refine-max", type=int, default=512, help="largest nside of the convergence check (default 512)")
    parser.add_argument("--threads", type=int, default=2, help="threads (default 2)")
    args = parser.parse_args(argv)

    print("1. First computation, lmax = 4 nside, no cache")
    print(f"{'nside':>6} {'seconds':>9} {'w(nside)':>10} {'w(2nside)':>10} {'w(3nside)':>10} {'w(4nside)':>10}")
    nside = 64
    while nside <= args.nside_max:
        t0 = time.perf_counter()
        w = _pixwin.pixel_window(nside, use_cache=False, nthreads=args.threads)
        dt = time.perf_counter() - t0
        vals = " ".join(f"{w[f * nside]:10.7f}" for f in (1, 2, 3, 4))
        print(f"{nside:6d} {dt:9.2f} {vals}")
        nside *= 4 if nside < 256 else 2

    print("\n2. Default rule against a refined rule: max relative error of w_l")
    print(f"{'nside':>6} {'lmax':>6} {'l<=3nside':>10} {'l<=4nside':>10} {'l<=8nside':>10}")
    for nside in (1, 2, 4, 16, 64, 256, 512, 1024):
        if nside > args.refine_max:
            break
        for factor in (4, 8):
            lmax = factor * nside
            base = _pixwin._compute_window_squared(nside, lmax, nthreads=args.threads)
            fine = _pixwin._compute_window_squared(
                nside,
                lmax,
                order=8 if factor == 4 else 12,
                bins_per_unit=2 * _pixwin._bins_per_unit(lmax, nside),
                pole_depth=16,
                nthreads=args.threads,
            )
            rel = _relative(base, fine)
            cols = [rel[: 3 * nside + 1].max(), rel[: 4 * nside + 1].max(), rel.max() if factor == 8 else np.nan]
            print(f"{nside:6d} {lmax:6d} " + " ".join(f"{c:10.1e}" if np.isfinite(c) else f"{'-':>10}" for c in cols))

    print("\n3. Against direct integration of Y_lm (midpoint rule, Richardson in the sub-pixel size)")
    print(f"{'nside':>6} {'lmax':>6} {'k':>4} {'max rel. diff of w_l':>22}")
    for nside, lmax, k in ((1, 8, 32), (2, 8, 32)):
        direct = (4.0 * _direct_window_squared(nside, 2 * k, lmax) - _direct_window_squared(nside, k, lmax)) / 3.0
        mine = _pixwin._compute_window_squared(nside, lmax)
        print(f"{nside:6d} {lmax:6d} {k:4d} {_relative(mine, direct).max():22.1e}")


if __name__ == "__main__":
    main()

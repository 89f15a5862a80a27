"""The far wings of the hydrogen lines' fitted profiles compiled (numba): the series of
:func:`specan.lines.profiles.voigt_wide` over the whole spectrum, a point at a time.

numpy sums that series (nine terms, complex, by Horner's rule) in ~20 passes over every point of
every hydrogen line (~31,000 points a spectrum on benchmarks/bench_lines.py's 40), its complex
division a scalar loop (31 us for 8,192 points against 4 us for a product; measured); here each
point's arithmetic is done in registers and the loop over a line's points is vectorised by the
compiler. The arithmetic is numpy's, written out in real numbers: its division of 1 by z (the
ratio of the smaller part to the larger, then the reciprocal of the scaled denominator), its
complex products as this machine's numpy makes them (each part a fused multiply-add: numpy 2.4's
loops for processors with FMA units, found here by comparing its products with both roundings,
measured; :func:`numpy_agrees` checks it in every process), the zero imaginary parts of the numbers it
promotes added and multiplied as numpy does. So the values are numpy's to the bit
(tests/test_lines_wingkernel.py), and where numpy's arithmetic is found to be another (a numpy
without those loops) the numpy code runs instead (:func:`specan.lines.compiled.wings`).

Compiled on first use, or loaded from numba's on-disk cache (``cache=True``); :func:`warm` (the
stage's ``warm_up``) does it ahead, so that forked workers inherit the machine code.

Measured: voigt_wide of 9 lines over 4,000 pixels 0.57-0.69 -> 0.26-0.28 ms, the bench's 39 calls
0.58 -> 0.22 ms a spectrum (CPU, alternated in one process, load 1-2); a scalar loop (not vectorised:
the division's branch, Python's division-by-zero check) was slower than numpy, 0.64-0.80 ms.
"""

from __future__ import annotations

from fractions import Fraction

import numpy as np

try:   # a dependency; should it fail to import (a platform without its wheels), the numpy code runs
    from llvmlite import ir
    from numba import njit, types
    from numba.extending import intrinsic
    AVAILABLE = True
except ImportError:   # pragma: no cover - exercised where numba is absent
    AVAILABLE = False

__all__ = ["AVAILABLE", "far_wings", "numpy_agrees", "warm"]


def _fused(a, b, c):
    """``a b + c`` rounded once (exact rational arithmetic, then one rounding to the nearest double)."""
    return float(Fraction(a) * Fraction(b) + Fraction(c))


def numpy_agrees():
    """Whether numpy's complex arithmetic here is the arithmetic :func:`far_wings` makes: its division
    of 1 by z as written in numpy's loops (two real divisions, no fused step), its products with each
    part rounded once (fma(ar, br, -(ai bi)), fma(ar, bi, ai br)).

    Checked on 64 values of the series' range (their reciprocals, their squares), two chosen so that a
    product rounded before its sum differs from a fused one (1 + 2^-30 + i: the real part of its
    square is 2^-29 + 2^-60)."""
    rng = np.random.default_rng(12)
    z = np.concatenate([[complex(1.0 + 2.0 ** -30, 1.0), complex(1.0, 1.0 + 2.0 ** -30)],
                        rng.uniform(-500.0, 500.0, 62) + 1j * rng.uniform(0.0, 20.0, 62)])
    with np.errstate(all="ignore"):
        r = np.divide(1.0, z)
        u = z * z
    for k in range(z.size):
        zr, zi = z.real[k], z.imag[k]
        if abs(zr) >= abs(zi):
            rat = zi / zr
            scl = 1.0 / (zr + zi * rat)
            rr, ri = (1.0 + 0.0 * rat) * scl, (0.0 - 1.0 * rat) * scl
        else:
            rat = zr / zi
            scl = 1.0 / (zi + zr * rat)
            rr, ri = (1.0 * rat + 0.0) * scl, (0.0 * rat - 1.0) * scl
        if (rr, ri) != (r.real[k], r.imag[k]):
            return False
        if (_fused(zr, zr, -(zi * zi)), _fused(zr, zi, zi * zr)) != (u.real[k], u.imag[k]):
            return False
    return True


if AVAILABLE:
    @intrinsic
    def _fma(typingctx, a, b, c):
        """``a b + c`` rounded once (LLVM's fma: the processor's instruction, or its exact emulation)."""
        def codegen(context, builder, signature, args):
            d = ir.DoubleType()
            fn = builder.module.declare_intrinsic("llvm.fma", [d], ir.FunctionType(d, [d, d, d]))
            return builder.call(fn, args)
        return types.float64(types.float64, types.float64, types.float64), codegen

    @njit(inline="always")
    def _product(ar, ai, br, bi):
        """numpy's complex product (ar + i ai)(br + i bi), each part rounded once."""
        return _fma(ar, br, -(ai * bi)), _fma(ar, bi, ai * br)

    @njit(cache=True, error_model="numpy")
    def _row(dx, inv, gamma, factor, limit, series, out, near):
        """:func:`far_wings` of one line's points (``dx``, contiguous), its widths' numbers given.

        Written without branches (the division's two cases by selection; a division by zero gives
        numpy's infinities, ``error_model="numpy"``, not Python's exception), so that the compiler
        vectorises the loop over the points."""
        zi = gamma * inv
        g2 = gamma * gamma
        s1, s2, s3, s4 = series[1], series[2], series[3], series[4]
        s5, s6, s7, s8 = series[5], series[6], series[7], series[8]
        count = 0
        for c in range(dx.shape[0]):
            d = dx[c]
            # (the far test as numpy makes it: dx dx + gamma gamma >= limit)
            close = not (d * d + g2 >= limit)
            near[c] = close
            count += close
            zr = d * inv
            # r = 1 / z: numpy's division of (1 + 0i) by z
            big = abs(zr) >= abs(zi)
            num = zi if big else zr
            den = zr if big else zi
            rat = num / den
            scl = 1.0 / (den + num * rat)
            rr = ((1.0 + 0.0 * rat) if big else (1.0 * rat + 0.0)) * scl
            ri = ((0.0 - 1.0 * rat) if big else (0.0 * rat - 1.0)) * scl
            # u = r r; acc = s8 u, then (acc + s_k) u down to s1 (a number added or multiplied as a complex
            # with zero imaginary part, as numpy promotes it); then (acc + 1) r
            ur, ui = _product(rr, ri, rr, ri)
            ar, ai = _product(s8, 0.0, ur, ui)
            ar, ai = _product(ar + s7, ai + 0.0, ur, ui)
            ar, ai = _product(ar + s6, ai + 0.0, ur, ui)
            ar, ai = _product(ar + s5, ai + 0.0, ur, ui)
            ar, ai = _product(ar + s4, ai + 0.0, ur, ui)
            ar, ai = _product(ar + s3, ai + 0.0, ur, ui)
            ar, ai = _product(ar + s2, ai + 0.0, ur, ui)
            ar, ai = _product(ar + s1, ai + 0.0, ur, ui)
            ar, ai = _product(ar + 1.0, ai + 0.0, rr, ri)
            out[c] = ai * factor
        return count

    @njit(cache=True)
    def far_wings(dx, inv, gamma, factor, limit, series, out, near):
        """The Voigt profile of every point of ``dx`` (a line a row) by the Faddeeva function's asymptotic
        series (``series``: its coefficients c_0..c_8), into ``out``: with z = (dx + i gamma) inv,
        ``factor Im((1 + sum_k c_k z^-2k) / z)`` (``inv``, ``gamma``, ``factor``: one number a row, as
        :func:`specan.lines.profiles.voigt_wide` makes them). Every point is summed; those near the
        centre (``dx^2 + gamma^2 < limit``: ``near`` set), where the series does not hold (1 / 0 at the
        centre), are the caller's to replace. Returns how many are near."""
        count = 0
        for q in range(dx.shape[0]):
            count += _row(dx[q], inv[q], gamma[q], factor[q], limit[q], series, out[q], near[q])
        return count


def warm():
    """Compile (or load from numba's cache) :func:`far_wings` for the types
    :func:`specan.lines.profiles.voigt_wide` passes, on a tiny problem. Does nothing without numba."""
    if not AVAILABLE:
        return
    dx = np.linspace(-50.0, 50.0, 8).reshape(2, 4)
    one = np.ones(2)
    far_wings(dx, one, one, one, one, np.ones(9), np.empty((2, 4)), np.empty((2, 4), bool))

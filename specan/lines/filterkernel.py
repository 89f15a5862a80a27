"""The matched filter's and the wide smoothing's correlations compiled (numba), vectorised over pixels.

:func:`specan.lines.data._band_filter` correlates each row with every pixel's own kernel in numpy,
three whole-array operations a distance; :func:`band_filter` makes the same sums in one pass a
distance, the compiler vectorising it. The wide smoothing (:func:`specan.lines.data.wide_smooth`)
correlates with one symmetric kernel through ``scipy.ndimage.correlate1d``, whose loop takes a pixel at
a time (its C source, from memory; 3x slower than this kernel, measured); :func:`symmetric_filter` makes
its sums, vectorised. Both keep the terms and their order (the
centre's, then the pairs at each distance from the farthest in, the ends extended with the nearest
value), so the values are the same to the bit (tests/test_lines_filterkernel.py holds them to numpy's
and scipy's; the numpy code stays the fallback, :mod:`.compiled`).

The interior pixels are summed over slices (a pair's two pixels and the output as three views, read
from index 0 up): indexed at ``i - r`` and ``i + r`` directly, numba's handling of negative indices kept
the compiler from vectorising the loop (2x slower than numpy, measured). Measured with slices:
``matched_filter`` on the bench's 40 spectra 0.19-0.20 -> 0.097-0.099 ms a call; ``_band_filter`` of 3 x
4,000 values at reach 24, 0.29 -> 0.08 ms; the wide smoothing's correlation of 2 x 4,000 values at its
widths (4-11 pixels), scipy's 67-223 us -> 23-67 us (CPU, alternated in one process, load 1-2).

Compiled on first use, or loaded from numba's on-disk cache (``cache=True``); :func:`warm` (the
stage's ``warm_up``) does it ahead for the types the stage passes, so that forked workers inherit the
machine code.
"""

from __future__ import annotations

import numpy as np

try:   # a dependency; should it fail to import (a platform without its wheels), the numpy code runs
    from numba import njit
    AVAILABLE = True
except ImportError:   # pragma: no cover - exercised where numba is absent
    AVAILABLE = False

__all__ = ["AVAILABLE", "band_filter", "symmetric_filter", "warm"]


if AVAILABLE:
    @njit(cache=True)
    def band_filter(values, weights, out):
        """Each row of ``values`` (rows, n) correlated with every pixel's own symmetric kernel into ``out``:
        ``weights[r, i]`` the weight at distance r of pixel i's kernel (r = 0..reach), the ends extended
        with the nearest value; per pixel the centre's term, then ``(left + right) weight`` at each
        distance from ``reach`` in, as :func:`specan.lines.data._band_filter` sums them."""
        reach = weights.shape[0] - 1
        rows, n = values.shape
        for q in range(rows):
            v, o = values[q], out[q]
            w0 = weights[0]
            for i in range(n):
                o[i] = v[i] * w0[i]
            for r in range(reach, 0, -1):
                wr = weights[r]
                lo = min(r, n)
                hi = max(n - r, lo)
                for i in range(lo):   # (the blue end: the left pixel is the first)
                    o[i] += (v[0] + v[min(i + r, n - 1)]) * wr[i]
                oi, vl, vr, wi = o[lo:hi], v[lo - r:hi - r], v[lo + r:hi + r], wr[lo:hi]
                for j in range(hi - lo):
                    oi[j] += (vl[j] + vr[j]) * wi[j]
                for i in range(hi, n):   # (the red end: the right pixel is the last)
                    o[i] += (v[max(i - r, 0)] + v[n - 1]) * wr[i]

    @njit(cache=True)
    def symmetric_filter(values, weights, out):
        """Each row of ``values`` (rows, n) correlated with one symmetric kernel (``weights``, 2 reach + 1,
        centre in the middle) into ``out``, the ends extended with the nearest value:
        ``scipy.ndimage.correlate1d(values, weights, axis=1, mode="nearest")``'s sums for a symmetric
        kernel, the centre's term, then ``(left + right) weight`` at each distance from the farthest in."""
        reach = weights.shape[0] // 2
        rows, n = values.shape
        for q in range(rows):
            v, o = values[q], out[q]
            centre = weights[reach]
            for i in range(n):
                o[i] = v[i] * centre
            for r in range(reach, 0, -1):
                wr = weights[reach - r]
                lo = min(r, n)
                hi = max(n - r, lo)
                for i in range(lo):
                    o[i] += (v[0] + v[min(i + r, n - 1)]) * wr
                oi, vl, vr = o[lo:hi], v[lo - r:hi - r], v[lo + r:hi + r]
                for j in range(hi - lo):
                    oi[j] += (vl[j] + vr[j]) * wr
                for i in range(hi, n):
                    o[i] += (v[max(i - r, 0)] + v[n - 1]) * wr


def warm():
    """Compile (or load from numba's cache) both kernels for the types the lines stage passes (the values
    writable, the set-up's weights read-only), on a tiny problem. Does nothing without numba."""
    if not AVAILABLE:
        return
    values, out = np.ones((2, 8)), np.empty((2, 8))
    band, kernel = np.full((3, 8), 0.25), np.array([0.25, 0.5, 0.25])
    band.flags.writeable = kernel.flags.writeable = False
    band_filter(values, band, out)
    symmetric_filter(values, kernel, out)

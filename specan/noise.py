"""Noise of a spectrum without an error array, measured where the lines are not.

Shared by ``prepare`` (the S/N it reports), the lines stage (equivalent-width errors) and
the velocity stage (the noise of its correlation): one estimate for all of them.

Method: the power spectrum of a spectrum seen through a Gaussian instrumental profile of
``s`` pixels (sigma) is the lines' power times exp(-4 pi^2 s^2 f^2) plus the noise's,
which is flat for uncorrelated pixels, so near the Nyquist frequency the noise dominates
(the noise plateau of the power spectrum, Brault & White 1971, A&A 13, 169; from memory).
DER_SNR (Stoehr et al. 2008) measures the same thing with a second difference, which
passes the lower frequencies too and so counts lines as noise in line-rich spectra at
2-3 pixels per FWHM (S/N 45 for the noiseless Kurucz Sun at R 2000, measured).

Here two band-pass filters pick a high band (0.40-0.50 cycles per pixel) and a middle band
(0.27-0.37); the robust power in each (a block median of the squared output) is
``N + A g_k``: ``N`` the noise power, ``A`` the lines' power before the instrument and
``g_k`` the share of it the instrument lets through each filter (computed from the
filter's response and ``s``). Two bands, two unknowns: the lines' leak into the high band
is removed (our own step: at R 2000 and 2 pixels per FWHM the solar lines alone read as
noise of S/N ~ 200 in the high band, measured). The resolution enters through ``s``.

Pixel correlation: noise smoothed by resampling has less power near Nyquist than at low
frequencies, which is what an integral over a line (an equivalent width) feels. White noise
has the same power in both halves of the high band; where (the lines' leak removed) the
lower half holds more than twice the upper's, there is no noise plateau to measure, and
the estimate falls back on DER_SNR per block (Stoehr et al. 2008), an upper limit where
lines add to it (the JHC 1984 library spectra, measured). Mild correlation (linear
interpolation a quarter pixel off) passes the test and reads the S/N high (190 for a
true per-pixel 126 and a low-frequency 100, measured); that is this method's limit.
Noise smoothed with the lines' own profile (the MILES library, smoothed to 2.5 A) is taken
for the lines' leak; where that leak exceeds the whole high band the test says "no plateau"
too (8 of every tenth MILES star still pass it and read S/N 1,100-3,300, measured).

The pixels masked for the lines but not for a defect (the telluric bands) enter the test
and the plateau's power (``noise_only``), not DER_SNR nor the S/N's median.
"""

from __future__ import annotations

import functools
import threading
from typing import NamedTuple

import numpy as np

__all__ = ["FluxNoise", "flux_noise", "kept_flux_noise", "spectrum_noise", "pixels_per_fwhm", "correlated_pixels", "BLOCK",
           "block_medians",
           "NOISELESS_SNR", "PLATEAU_METHOD", "DERSNR_METHOD"]

#: Above this S/N the flux is taken for a noiseless model (S/N reported as None).
NOISELESS_SNR = 1.0e5
#: Pixels per block of the running noise level (the noise may change along the spectrum).
BLOCK = 256
#: Pixels per instrumental FWHM assumed when the resolving power is not known (common practice).
_DEFAULT_PIXELS_PER_FWHM = 2.5
#: Median of a chi-square with one degree of freedom: median(y^2) = 0.4549 sigma^2 for normal y.
_CHI2_1_MEDIAN = 0.454936
_TAPS = 61
_HIGH = (0.40, 0.50)
_MIDDLE = (0.27, 0.37)
#: Two halves of the high band, for the test of a white-noise plateau (longer filters: narrower bands).
_PLATEAU = ((0.38, 0.44), (0.46, 0.50))
_PLATEAU_TAPS = 121
#: Above this share of the high band's power taken for the lines' leak (median over blocks) no noise
#: is left to measure (see flux_noise; our choice).
_MAX_LEAK_SHARE = 1.0


class FluxNoise(NamedTuple):
    """A noise estimate from the flux alone."""

    sigma: np.ndarray   #: noise per pixel, flux units (NaN where it cannot be told)
    snr: float | None   #: median flux / sigma over the good pixels (None: no estimate)
    method: str         #: what was measured, for notes and ``noise_source`` columns


@functools.lru_cache(maxsize=8)
def _filters():
    """Band-pass FIR filters of unit noise gain (sum h^2 = 1) and their power responses."""
    from scipy.signal import firwin

    out = []
    for (lo, hi), taps in zip((_HIGH, _MIDDLE) + _PLATEAU, (_TAPS, _TAPS, _PLATEAU_TAPS, _PLATEAU_TAPS)):
        # Kaiser window, beta 6: ~60 dB stop band, so the continuum and the line cores at low
        # frequency (10^3-10^5 times the noise power) do not leak in (common practice)
        if hi >= 0.5:
            h = firwin(taps, lo, pass_zero=False, window=("kaiser", 6.0), fs=1.0)
        else:
            h = firwin(taps, [lo, hi], pass_zero=False, window=("kaiser", 6.0), fs=1.0)
        h = h / np.sqrt(np.sum(h ** 2))
        resp = np.abs(np.fft.rfft(h, 4096)) ** 2
        out.append((h, resp))
    freq = np.fft.rfftfreq(4096)
    return tuple(out), freq


@functools.lru_cache(maxsize=16)
def _bank_transforms(length):
    """The four filters' transforms at ``length``, each centred on the middle tap of the longest (read only).

    A filter of 61 taps padded with 30 zeros on either side filters as it does alone, with the
    121-tap filters' delay: one slice of the output then serves all four.
    """
    from scipy import fft as sfft

    filters, _ = _filters()
    bank = np.zeros((len(filters), _PLATEAU_TAPS))
    for i, (h, _) in enumerate(filters):
        start = (_PLATEAU_TAPS - h.size) // 2
        bank[i, start:start + h.size] = h
    out = sfft.rfft(bank, length, axis=1)
    out.flags.writeable = False
    return out


def _band_passed(filled):
    """``np.convolve(filled, h, mode="same")`` of the four filters (high, middle, plateau halves), (4, n).

    One transform of the flux and one batched inverse for the four: the direct sums cost about three times
    as much (0.29 ms against 0.105 for 4,000 pixels, measured); the outputs differ from them by rounding
    only (below 1e-13 of the flux, tests/test_noise.py), far below a float32 file's own.
    """
    from scipy import fft as sfft

    n = filled.size
    # real=True: lengths with no prime factor above 5 (pocketfft is slow on 7 and 11)
    length = int(sfft.next_fast_len(n + _PLATEAU_TAPS - 1, real=True))
    out = sfft.irfft(sfft.rfft(filled, length)[None, :] * _bank_transforms(length), length, axis=1)
    half = (_PLATEAU_TAPS - 1) // 2
    return out[:, half:half + n]


@functools.lru_cache(maxsize=512)
def _leak(s_pix):
    """Share ``g_k`` of a flat line power spectrum that a Gaussian profile of ``s_pix`` passes through each filter."""
    filters, freq = _filters()
    trans = np.exp(-4.0 * np.pi ** 2 * s_pix ** 2 * freq ** 2)
    return tuple(float(np.mean(resp * trans)) for _, resp in filters)


@functools.lru_cache(maxsize=16)
def _block_layout(n, block):
    """(edges, centres, inside, pix) of ``n`` pixels in ``max(n // block, 1)`` blocks, read-only: the
    blocks' edges and centres, and each block's pixels as a row (``pix``, clipped to the last pixel past
    the block's end, ``inside`` False there). The same for every spectrum of a set-up: made once."""
    nb = max(n // block, 1)
    edges = np.linspace(0, n, nb + 1).astype(int)
    centres = 0.5 * (edges[:-1] + edges[1:]) - 0.5
    size = np.diff(edges)
    k = np.arange(int(size.max()))
    inside = k[None, :] < size[:, None]
    pix = np.minimum(edges[:-1, None] + k[None, :], n - 1)
    for a in (edges, centres, inside, pix):
        a.flags.writeable = False
    return edges, centres, inside, pix


#: Most distinct middle positions a partition is asked for before a full sort is cheaper (a partition
#: about 11 positions of 15 rows of 267 took 34 us, the sort 64, measured; our choice).
_MAX_KTH = 24


def _middle_values(rows, count):
    """The median of each row's first ``count`` entries, the rest +inf (past them): the middle one or
    the sum of the middle two halved, as ``np.median`` takes them (its values to the bit); NaN for none.
    ``rows`` (..., blocks, width)."""
    lo_k, hi_k = np.maximum((count - 1) // 2, 0), np.minimum(count // 2, rows.shape[-1] - 1)
    kth = np.unique(np.concatenate([lo_k, hi_k]))
    # only the middle entries are needed: a partition about them puts there what a full sort would
    rows = np.partition(rows, kth, axis=-1) if kth.size <= _MAX_KTH else np.sort(rows, axis=-1)
    at = np.arange(count.size)
    lo, hi = rows[..., at, lo_k], rows[..., at, hi_k]
    with np.errstate(invalid="ignore"):
        # (lo + hi) / 2: np.median's mean of the middle two, a sum of two then a division
        med = np.where(count % 2 == 1, hi, (lo + hi) / 2.0)
    return np.where(count > 0, med, np.nan)


def _block_power(y, valid, block):
    """Median of y^2 over each block's valid pixels / median of chi2_1 (NaN for blocks with too few).

    ``y`` is one row of n pixels or several (rows, n) sharing ``valid``: then (rows, blocks) powers.
    """
    y = np.asarray(y)
    _, centres, inside, pix = _block_layout(y.shape[-1], block)
    # every block's median at once: the valid squares of each block in one row (the rest +inf, past
    # them), the middle one or the mean of the middle two read off (:func:`_middle_values`); np.median's
    # values exactly, without a call per block (half of this function's cost)
    ok = inside & valid[pix]
    count = ok.sum(axis=1)
    sq = (y * y)[..., pix]     # the squares, gathered once (the same numbers as squaring the gathered)
    sq[..., ~ok] = np.inf
    out = np.where(count >= block // 4, _middle_values(sq, count) / _CHI2_1_MEDIAN, np.nan)
    return centres, out


def block_medians(values, valid, block=BLOCK):
    """(centres, medians, counts) of ``values`` over each block's ``valid`` pixels.

    The blocks are those the running noise level is measured on: ``max(n // block, 1)`` blocks of ``n``
    pixels, as near equal as whole pixels allow (``np.linspace(0, n, nb + 1).astype(int)``), their
    centres in pixels. Each median is ``np.median(values[a:b][valid[a:b]])``'s value to the bit (NaN
    for a block with none), all at once: blocks of one length are rows of a reshaped view, unequal ones
    gathered into rows. A call of ``np.median`` per block cost ~20 us each, 15 a 4,000-pixel spectrum
    (measured). ``values`` must be finite where ``valid``.

    Parameters
    ----------
    values : array of float, (n,)
    valid : array of bool, (n,)
    block : int
        Pixels per block (:data:`BLOCK`).

    Returns
    -------
    centres : array of float, (blocks,)
        Read-only.
    medians : array of float, (blocks,)
    count : array of int, (blocks,)
        Valid pixels in each block.
    """
    values = np.asarray(values, float)
    valid = np.asarray(valid, bool)
    _, centres, inside, pix = _block_layout(values.size, block)
    if inside.all():   # blocks of one length: a reshaped view
        ok = valid.reshape(pix.shape)
        rows = np.where(ok, values.reshape(pix.shape), np.inf)
    else:
        ok = inside & valid[pix]
        rows = np.where(ok, values[pix], np.inf)
    count = ok.sum(axis=1)
    return centres, _middle_values(rows, count), count


def valid_for(good, taps):
    """Pixels whose filter of ``taps`` taps reaches no bad pixel.

    The pixels ``np.convolve(bad, np.ones(taps), mode="same")`` finds no bad pixel at, from running
    counts of the bad ones (whole numbers: the same pixels; under half of the convolution's time, measured).
    """
    good = np.asarray(good, bool)
    n = good.size
    if n < taps:   # "same" is then as long as the filter: numpy's own way
        return np.convolve((~good).astype(float), np.ones(taps), mode="same") < 0.5
    bad_before = np.concatenate([[0], np.cumsum(~good)])     # bad pixels before each index
    # mode="same": output i sums the pixels i + (taps - 1) // 2 - taps + 1 ... i + (taps - 1) // 2 (those inside)
    end = np.arange(n) + (taps - 1) // 2
    return bad_before[np.minimum(end, n - 1) + 1] - bad_before[np.maximum(end - taps + 1, 0)] == 0


def _has_plateau(halves, valid, lines_power, g):
    """Whether the noise is white near Nyquist: the same power in both halves of the high band.

    The lines' leak (``lines_power`` times each half's share ``g[2]``, ``g[3]``) removed,
    white noise has equal power in 0.38-0.44 and 0.46-0.50 cycles per pixel; noise
    smoothed by resampling falls toward Nyquist as the lines do (linear interpolation
    half-way between pixels: cos^2(pi f), ten times lower in the upper half). ``halves``: the flux
    through the two halves' filters (:func:`_band_passed`'s last two rows).
    """
    p = []
    for y in halves:
        y = y[valid]
        if y.size < 2 * _PLATEAU_TAPS:
            return True   # too few pixels to tell: assume white (the usual case)
        p.append(np.median(y * y) / _CHI2_1_MEDIAN)
    lp = lines_power if np.isfinite(lines_power) else 0.0
    n1, n2 = p[0] - lp * g[2], p[1] - lp * g[3]
    # white: ratio 1 (+-10% scatter); 2 leaves room for the model's errors (our choice)
    return n2 > 0 and n1 / n2 < 2.0


def _dersnr_power(filled, good, block):
    """Noise power per block by DER_SNR (Stoehr et al. 2008): (1.482602 / sqrt 6 median|2f_i - f_i-2 - f_i+2|)^2."""
    d = np.zeros(filled.size)
    d[2:-2] = np.abs(2.0 * filled[2:-2] - filled[:-4] - filled[4:])
    valid = valid_for(good, 5)
    valid[:2] = valid[-2:] = False
    _, med = _block_power(d, valid, block)   # median(d^2)/0.4549 = (median d / 0.6745)^2
    return med * _CHI2_1_MEDIAN * (1.482602 ** 2 / 6.0)


#: The start of :attr:`FluxNoise.method` for each of the two estimates.
PLATEAU_METHOD = "flux: high-frequency power, lines' leak removed (Brault & White 1971)"
DERSNR_METHOD = "flux: DER_SNR (Stoehr et al. 2008; no white-noise plateau, pixels correlated)"


def correlated_pixels(method):
    """Whether a :attr:`FluxNoise.method` found the pixels correlated (True), white (False) or neither (None).

    For a later estimate on the same pixels to follow an earlier one (``flux_noise(..., correlated=)``).
    """
    if not method:
        return None
    if method.startswith(DERSNR_METHOD):
        return True
    return False if method.startswith(PLATEAU_METHOD) else None


def _block_widths(n, pixels_per_fwhm, block):
    """(block length, the instrument's Gaussian sigma in pixels at each block's centre) for ``n`` pixels:
    the blocks :func:`_block_power` measures on, and the widths :func:`_leak` is asked for."""
    blk = min(block, max(n // 2, 2 * _TAPS))
    centres = _block_layout(n, blk)[1]   # (the blocks _block_power measures on)
    ppf = _DEFAULT_PIXELS_PER_FWHM if pixels_per_fwhm is None else pixels_per_fwhm
    ppf = np.broadcast_to(np.asarray(ppf, float), (n,))
    return blk, np.interp(centres, np.arange(n), ppf) / 2.3548   # FWHM -> Gaussian sigma (common practice)


def flux_noise(flux, good=None, pixels_per_fwhm=None, block=BLOCK, correlated=None, noise_only=None):
    """Noise per pixel of a spectrum without an error array, from its high-frequency power.

    Parameters
    ----------
    flux : array
        Flux on its native pixels (normalised or not).
    good : bool array, optional
        Usable pixels (default: the finite ones). Filter outputs touching a bad pixel are
        not used.
    pixels_per_fwhm : float or array, optional
        Instrumental FWHM in pixels (``lambda / R / pixel width``); default 2.5 (common practice).
    block : int
        Pixels per block of the running noise level.
    correlated : bool, optional
        Whether the pixels are correlated (DER_SNR) or not (the plateau), as an earlier estimate on
        the same pixels found (:func:`correlated_pixels`); default: the plateau test decides. The
        lines stage follows the test ``prepare`` made on the flux before normalisation, so that the
        S/N reported and the equivalent widths' errors rest on one decision: the test on the
        normalised flux of a line-rich spectrum tips where the one before did not (the Kurucz Sun at
        S/N 1000: ratio 2.17 against 1.68, measured).
    noise_only : bool array, optional
        Pixels left out of ``good`` that hold noise like any other (the telluric bands ``prepare``
        masks for the lines): the white-noise test and the high-band power use them, DER_SNR and the
        S/N reported do not (a second difference counts their lines as noise). Without them a
        spectrum reaching past 6800 A keeps mostly its blue, line-rich pixels, whose lines tip the
        test (the Kurucz Sun over 3700-8800 A at S/N 300 read 39, DER_SNR; 264 with them, measured).

    Returns
    -------
    FluxNoise
        ``sigma`` is the noise level of each block interpolated to every pixel (the mean
        over the block's flux levels: photon noise deeper in lines is not modelled).
    """
    from scipy.ndimage import median_filter

    y = np.asarray(flux, float)
    n = y.size
    good = np.isfinite(y) if good is None else (np.asarray(good, bool) & np.isfinite(y))
    nan = FluxNoise(np.full(n, np.nan), None, "flux: too few pixels to measure the noise")
    if good.sum() < 2 * _TAPS:
        return nan
    # the pixels the plateau is measured on: the good ones and those holding noise only
    usable = good if noise_only is None else good | (np.asarray(noise_only, bool) & np.isfinite(y))
    idx = np.flatnonzero(usable)
    filled = np.where(usable, y, np.interp(np.arange(n), idx, y[idx]))
    valid = valid_for(usable, _TAPS)
    passed = _band_passed(filled)    # high, middle, the high band's two halves
    blk, s_blk = _block_widths(n, pixels_per_fwhm, block)
    centres, (p_hi, p_mid) = _block_power(passed[:2], valid, blk)
    ok = np.isfinite(p_hi) & np.isfinite(p_mid)
    if not ok.any():
        return nan
    g = np.array([_leak(round(float(s), 2)) for s in s_blk])  # per block: (g_high, g_mid)
    # N + A g_hi = p_hi, N + A g_mid = p_mid; the lines' power A cannot be negative
    a = np.clip((p_mid - p_hi) / np.maximum(g[:, 1] - g[:, 0], 1e-12), 0.0, None)
    leak = a * g[:, 0]
    power = p_hi - leak
    # a block whose lines' leak seems to exceed its high band (scatter) keeps a quarter of it
    power = np.maximum(power, 0.25 * p_hi)
    method = PLATEAU_METHOD
    if correlated is None:
        # Where the leak removed exceeds the whole high band in most blocks, the noise left is the
        # floor above, not a measurement (at 2.5 pixels per FWHM a 1% error in the instrumental
        # width moves the leak by ~18%: exp(-4 pi^2 s^2 f^2) at 0.45 cycles per pixel): no plateau
        # can be told. Measured, median over blocks of leak / high band: 0.54-0.90 on the Kurucz
        # Sun at S/N 300 to noiseless (3700-8800 and 3850-7300 A); 0.11-4.8 (median 1.05) on the
        # MILES stars that passed the plateau test before, their noise smoothed to 2.5 A like their
        # lines and so read as the lines' leak (S/N 1,100-8,800 against DER_SNR's 28-240 on the
        # other MILES stars); 0.016 on JHC (1984).
        correlated = bool(np.median(leak[ok] / p_hi[ok]) > _MAX_LEAK_SHARE) or not _has_plateau(
            passed[2:], valid_for(usable, _PLATEAU_TAPS), np.nanmedian(a[ok]),
            _leak(round(float(np.median(s_blk)), 2)))
    if correlated:
        # no white-noise plateau near Nyquist: the pixels are correlated (resampled or
        # smoothed data) and the noise an equivalent width feels cannot be seen there;
        # DER_SNR (Stoehr et al. 2008) per block, an upper limit where lines add to it
        power = _dersnr_power(filled, good, blk)
        ok = np.isfinite(power)
        method = DERSNR_METHOD
    sig_blk = np.sqrt(np.where(ok, power, np.nan))
    # neighbouring blocks smooth the estimate (each block's own scatter is ~10%)
    if sig_blk.size >= 3:
        okb = np.isfinite(sig_blk)
        sig_blk[okb] = median_filter(sig_blk[okb], size=3, mode="nearest")
    okb = np.isfinite(sig_blk) & (sig_blk > 0)
    if not okb.any():
        return nan
    sigma = np.interp(np.arange(n), centres[okb], sig_blk[okb])
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = y[good] / sigma[good]
    snr = float(np.median(ratio)) if ratio.size else None
    if method == DERSNR_METHOD:
        # the S/N as DER_SNR defines it over the whole spectrum (median flux / noise of the
        # usable pixels, Stoehr et al. 2008), as specan reported before the plateau method
        packed = y[good]
        der = 1.482602 / np.sqrt(6.0) * np.median(np.abs(2.0 * packed[2:-2] - packed[:-4] - packed[4:]))
        snr = float(np.median(packed) / der) if der > 0 else None
    if snr is None or not np.isfinite(snr) or snr > NOISELESS_SNR:
        # a noiseless model: the "noise" left is rounding; no S/N to report
        return FluxNoise(sigma, None, method + "; no noise found (a noiseless model?)")
    return FluxNoise(sigma, snr, method)

#: How many of the last estimates :func:`kept_flux_noise` keeps (one spectrum's stages ask in a row).
KEPT_ESTIMATES = 2
_KEPT = []
_KEPT_LOCK = threading.Lock()


def _what_counts(flux, good, pixels_per_fwhm, block, correlated, noise_only):
    """Everything :func:`flux_noise`'s result depends on, as comparable values (bytes and numbers).

    The instrumental width enters the estimate only as the Gaussian sigma at the blocks' centres and
    their median, each rounded to 0.01 pixel (:func:`_leak`'s argument): those, not the widths per
    pixel, go in, so that two stages reading the same pixels on wavelengths in different media (the
    velocity stage's vacuum, the lines' stated axis: widths differing by ~1e-5) share one estimate.
    """
    y = np.ascontiguousarray(flux, dtype=float)
    n = y.size
    ok = np.isfinite(y) if good is None else (np.asarray(good, bool) & np.isfinite(y))
    extra = b"" if noise_only is None else np.ascontiguousarray(noise_only, dtype=bool).tobytes()
    _, s_blk = _block_widths(n, pixels_per_fwhm, block)
    # (rounded as flux_noise rounds them for _leak, so that equal keys mean equal arguments)
    widths = tuple(round(float(s), 2) for s in s_blk) + (round(float(np.median(s_blk)), 2),)
    return (y.tobytes(), ok.tobytes(), extra, widths, int(block), correlated)


def kept_flux_noise(flux, good=None, pixels_per_fwhm=None, block=BLOCK, correlated=None, noise_only=None):
    """:func:`flux_noise`, kept for the next stage that asks on the same pixels.

    In the night run the velocity and lines stages estimate the noise of the same normalised flux
    (0.9 ms each on 4,000 pixels, measured): the second gets the first's estimate. A hit needs equal
    flux, masks and settings to the byte, and equal block widths as :func:`flux_noise` rounds them
    (:func:`_what_counts`), so it returns exactly what a new estimate would. The kept ``sigma`` is
    read-only: a caller that must change it copies it.
    """
    key = _what_counts(flux, good, pixels_per_fwhm, block, correlated, noise_only)
    with _KEPT_LOCK:
        for kept_key, kept in _KEPT:
            if kept_key == key:
                return kept
    est = flux_noise(flux, good, pixels_per_fwhm, block, correlated, noise_only)
    est.sigma.flags.writeable = False
    with _KEPT_LOCK:
        _KEPT.append((key, est))
        del _KEPT[:-KEPT_ESTIMATES]
    return est


def spectrum_noise(spectrum, resolving_power=None):
    """Noise per pixel of a spectrum: its error array, else :func:`flux_noise`.

    Parameters
    ----------
    spectrum : specutils.Spectrum
        Normalised or not; masked pixels (``spectrum.mask``) are left out of the estimate.
    resolving_power : float, optional
        Default: ``info.resolving_power``, else 2.5 pixels per FWHM are assumed.

    Returns
    -------
    sigma : astropy.units.Quantity
        Noise per pixel in the flux unit (NaN where none can be told).
    source : str
        ``"error array"`` or the flux estimate's ``method``.
    """

    from .obsinfo import get_info, spectrum_arrays

    wave, flux, err, mask = spectrum_arrays(spectrum)
    if err is not None and np.any(np.isfinite(err) & (err > 0)):
        return err * spectrum.flux.unit, "error array"
    r = resolving_power or get_info(spectrum).resolving_power
    est = flux_noise(flux, ~mask & np.isfinite(flux), pixels_per_fwhm(wave, r))
    return est.sigma * spectrum.flux.unit, est.method


def pixels_per_fwhm(wave, resolving_power):
    """Instrumental FWHM in pixels at each pixel (``lambda / R / pixel width``), or None when R is unknown."""
    if resolving_power is None or not np.isfinite(resolving_power) or wave.size < 2:
        return None
    dx = np.gradient(np.asarray(wave, float))
    return np.asarray(wave, float) / float(resolving_power) / np.abs(dx)

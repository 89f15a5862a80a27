"""Lines: identification, equivalent widths, widths, uncertainties and band indices.

Three public functions, each taking a specutils ``Spectrum`` and returning an
astropy ``QTable`` with units:

- :func:`identify` finds absorption (and emission) features with a matched
  filter at the spectrum's resolution and matches them to a line list within a
  velocity window; it marks blends and reports strong unidentified features.
- :func:`measure` measures every listed atomic line the spectrum covers:
  centroid, depth, FWHM and equivalent width by direct integration over an
  adaptive window and by profile fitting (Gaussian or Voigt, several components
  for blends), with uncertainties from the error array and from Cayrel (1988).
- :func:`band_indices` measures band indices (feature window against a
  pseudo-continuum through side windows) as equivalent widths, magnitudes or ratios.

Spectra that are not continuum-normalised go through :func:`specan.prepare.prepare`
first (band indices use the un-normalised flux, which their definitions assume).
The spectral axis stays in its own medium; the list's ``wave_air`` or ``wave_vac``
column is chosen to match.
"""

from __future__ import annotations


import astropy.units as u
import numpy as np
from astropy.constants import c as _c
from astropy.nddata import StdDevUncertainty
from astropy.table import QTable
from scipy.ndimage import gaussian_filter1d
from scipy.optimize import least_squares
from scipy.signal import find_peaks, peak_prominences
from scipy.special import voigt_profile

from .linelist import load_bands, load_linelist
from .obsinfo import get_info
from . import resolution
from .doppler import doppler_factor
from .resolution import DEFAULT_PIXELS_PER_FWHM, GAUSS_FWHM, narrowest_line_width, normalised_arrays

__all__ = ["identify", "measure", "band_indices", "analyse", "cayrel_error", "doppler_factor",
           "estimate_resolving_power"]

C_KMS = _c.to_value(u.km / u.s)

# Matched-filter significance above which a feature counts as detected (common practice: 3-5 sigma).
DETECT_SIGMA = 4.0
# Smallest depth (below the surrounding crests, or the local continuum) counted as a line:
# continuum ripples and flat-field residuals of a few 0.1% are significant at very high
# S/N but are not lines (common practice: ~1% systematic floor at these resolutions).
MIN_DEPTH = 0.01


# ----------------------------------------------------------------------------- helpers


def cayrel_error(fwhm, pixel, snr):
    """Equivalent-width error of a Gaussian line from Cayrel (1988).

    ``sigma_EW = 1.5 * sqrt(FWHM * pixel) / (S/N)`` (Cayrel 1988, IAU Symp. 132, 345;
    from memory; continuum placement not included).

    Parameters
    ----------
    fwhm, pixel : astropy.units.Quantity or float
        Line FWHM and pixel size (same unit).
    snr : float
        Continuum signal-to-noise ratio per pixel.

    Returns
    -------
    Quantity or float
        In the unit of ``fwhm``.
    """
    return 1.5 * np.sqrt(fwhm * pixel) / snr


class _Data:
    """Plain arrays of one normalised spectrum plus everything derived once."""

    def __init__(self, spectrum, resolving_power=None):
        info = get_info(spectrum)
        self.info = info
        self.medium = info.medium
        arrays = normalised_arrays(spectrum)
        self.wave, self.flux, self.sigma, self.good, self.noise_source = arrays
        self.weight = np.where(self.good, 1.0 / self.sigma**2, 0.0)
        self.dx = np.diff(_pixel_edges(self.wave))  # pixel widths, Angstrom
        self.r_source = "argument"
        r = resolving_power if resolving_power is not None else info.resolving_power
        narrow = self.narrow = narrowest_line_width(self.wave, self.flux, self.sigma, self.good)
        if r is None:
            if narrow is not None:
                r, self.r_source = 1.0 / narrow, "estimated from the narrowest lines"
            else:
                r = float(np.median(self.wave / (DEFAULT_PIXELS_PER_FWHM * np.median(np.diff(self.wave)))))
                self.r_source = f"assumed ({DEFAULT_PIXELS_PER_FWHM} pixels per FWHM)"
        elif resolving_power is None:
            self.r_source = "file"
        self.resolving_power = float(r)
        # the instrument can never be sampled finer than ~1 pixel per FWHM
        self.fwhm = np.maximum(self.wave / self.resolving_power, self.dx)
        # typical line width: the instrument, or broader when the stars' lines are resolved
        # Only clearly resolved lines count as broadened: the narrow-line estimate reads
        # 3-10% above the instrument on unresolved lines at 2 pixels per FWHM (measured on
        # the Kurucz solar model at its R = 2000), from blends and pixel sampling.
        ratio = 1.0 if narrow is None else narrow * self.resolving_power
        self.broadening = float(min(ratio, 20.0)) if ratio > 1.2 else 1.0
        self.line_fwhm = self.fwhm * self.broadening
        self.sig_pix = self.line_fwhm / GAUSS_FWHM / self.dx
        self._filter()

    def _filter(self):
        """Matched filter significance, weighted smoothed flux and its noise, at each pixel's width.

        The instrument width in pixels changes along the spectrum (constant R on a
        linear grid), so the arrays are filtered at a ladder of widths 5% apart and
        each pixel takes the result at its own width.
        """
        n = self.wave.size
        d = 1.0 - self.flux
        wd, wf, w = self.weight * d, self.weight * self.flux, self.weight
        step = np.log(1.05)
        q = np.round(np.log(np.maximum(self.sig_pix, 0.3)) / step).astype(int)
        self.signif = np.empty(n)
        self.smooth = np.empty(n)
        self.smooth_err = np.empty(n)
        for level in np.unique(q):
            s = float(np.exp(level * step))
            sel = q == level
            j = np.arange(-int(4 * s + 0.5), int(4 * s + 0.5) + 1)
            k1 = np.exp(-0.5 * (j / s) ** 2).sum()  # sum of the kernel g
            k2 = np.exp(-((j / s) ** 2)).sum()  # sum of g**2
            f_wd = gaussian_filter1d(wd, s, mode="nearest")[sel]
            f_wf = gaussian_filter1d(wf, s, mode="nearest")[sel]
            f_w = gaussian_filter1d(w, s, mode="nearest")[sel]
            f_w2 = gaussian_filter1d(w, s / np.sqrt(2.0), mode="nearest")[sel]
            # S = sum(w g d) / sqrt(sum(w g^2)): amplitude over its error for a Gaussian at each pixel
            self.signif[sel] = k1 * f_wd / np.sqrt(np.maximum(k2 * f_w2, 1e-300))
            safe = np.maximum(f_w, 1e-300)
            self.smooth[sel] = f_wf / safe
            # variance of a weighted mean with kernel weights g: sum(g^2 w) / sum(g w)^2
            self.smooth_err[sel] = np.sqrt(k2 * f_w2 / np.maximum((k1 * f_w) ** 2, 1e-300))
        self.smooth = np.where(np.isfinite(self.smooth), self.smooth, 1.0)
        s3 = 3.0 * float(np.median(self.sig_pix))
        f_w = np.maximum(gaussian_filter1d(w, s3, mode="nearest"), 1e-300)
        self.smooth_wide = gaussian_filter1d(wf, s3, mode="nearest") / f_w
        self.smooth_wide = np.where(np.isfinite(self.smooth_wide), self.smooth_wide, 1.0)
        j = np.arange(-int(4 * s3 + 0.5), int(4 * s3 + 0.5) + 1)
        k1, k2 = np.exp(-0.5 * (j / s3) ** 2).sum(), np.exp(-((j / s3) ** 2)).sum()
        f_w2 = gaussian_filter1d(w, s3 / np.sqrt(2.0), mode="nearest")
        self.smooth_wide_err = np.sqrt(k2 * f_w2 / np.maximum((k1 * f_w) ** 2, 1e-300))

    def divided(self, model):
        """A copy with flux and noise divided by ``model`` (filters recomputed)."""
        import copy

        new = copy.copy(self)
        new.flux = self.flux / model
        new.sigma = self.sigma / model
        new.weight = np.where(self.good, 1.0 / new.sigma**2, 0.0)
        new._filter()
        return new

    def index(self, wave):
        return int(np.clip(np.searchsorted(self.wave, wave), 0, self.wave.size - 1))


def estimate_resolving_power(spectrum):
    """Resolving power from the widths of the narrowest lines, or None when they give none.

    :func:`specan.resolution.estimate_resolving_power` for a spectrum that may not be
    continuum-normalised yet (then :func:`specan.prepare.prepare` is applied first).

    Parameters
    ----------
    spectrum : specutils.Spectrum

    Returns
    -------
    float or None
        R = lambda / FWHM.
    """
    from .errors import SpecanError

    try:
        return resolution.estimate_resolving_power(_normalised(spectrum))
    except SpecanError:
        return None


def _hydrogen_model(data, fits, pred, fwhm_at, is_h, detected, ep_low):
    """Transmission of the fitted hydrogen absorption lines on the pixel grid, or None.

    A hydrogen line with a listed low-excitation line (lower level below 1 eV, e.g.
    Ca II H beside H epsilon) closer than 0.6 line widths is left out: in cool stars
    that partner can outweigh the hydrogen line and the fit cannot tell them apart.
    High-excitation partners (He II Pickering lines beside the Balmer lines) do not
    block: their share of an unresolvable blend goes to hydrogen.
    """
    model = np.ones(data.wave.size)
    used = 0
    others = pred[(~is_h) & (np.nan_to_num(ep_low, nan=0.0) < 1.0)]
    for i, fit in fits.items():
        if not is_h[i] or not detected[i] or fit["sign"] < 0 or fit["ew"] <= 0:
            continue
        if not abs(fit["ew"] - fit["ew_int"]) <= 0.3 * abs(fit["ew_int"]):
            continue  # the profile does not describe the line (continuum trouble): leave it
        if others.size and np.min(np.abs(others - fit["centre"])) < 0.6 * fwhm_at[i]:
            continue  # an unresolvable blend with a listed line: keep it whole
        _, prof = _profiles(data.wave, np.array([fit["centre"]]), 0.0, fit["sigma"], fit["gamma"],
                            fit["profile"])
        model *= 1.0 - fit["ew"] * prof[0]
        used += 1
    if not used:
        return None
    return np.clip(model, 0.05, 1.0)


def _normalised(spectrum):
    info = get_info(spectrum)
    if info.normalized:
        return spectrum
    from .prepare import prepare

    return prepare(spectrum)


def _lab_column(data):
    return "wave_vac" if data.medium == "vacuum" else "wave_air"


def _features(data, detect_sigma, min_depth=MIN_DEPTH):
    """Absorption and emission features.

    Peaks of the matched-filter significance, plus local extrema of the flux itself
    that stand out of their surroundings by 3 sigma (prominence) where the matched
    filter is significant: at low resolution neighbouring lines merge into one
    broad filter peak, and the flux minima still separate them (for deblending).
    Every feature must also stand out of the smoothed flux around it by
    ``min_depth`` (prominence): at very high S/N, continuum ripples of a few tenths
    of a per cent are significant but are not lines.
    """
    out = []
    noise = float(np.median(data.sigma[data.good]))
    for sign in (1.0, -1.0):
        s = sign * np.where(data.good, data.signif, 0.0)
        peaks, _ = find_peaks(s, height=detect_sigma)
        fwp = np.interp(peaks, np.arange(s.size), data.line_fwhm) if peaks.size else peaks
        raw, _ = find_peaks(np.where(data.good, -sign * data.flux, -np.inf), prominence=3.0 * noise)
        raw = raw[s[raw] >= detect_sigma]
        if raw.size and peaks.size:
            near = np.abs(data.wave[raw][:, None] - data.wave[peaks][None, :]) < 0.5 * fwp[None, :]
            raw = raw[~near.any(axis=1)]
        cand = np.concatenate([peaks, raw]).astype(int)
        if cand.size:
            # prominence in the smoothed flux, at the extremum nearest each candidate
            sm = -sign * data.smooth
            ext, _ = find_peaks(sm)
            if ext.size:
                j = np.clip(np.searchsorted(ext, cand), 1, max(ext.size - 1, 1))
                left, right = ext[np.maximum(j - 1, 0)], ext[np.minimum(j, ext.size - 1)]
                nearest = np.where(np.abs(left - cand) <= np.abs(right - cand), left, right)
                prom = peak_prominences(sm, nearest)[0]
                keep = prom >= max(min_depth, 0.0)
                if sign < 0:
                    # a crest between absorption lines is prominent too: emission must also
                    # rise 3 min_depth above the normalised continuum (continuum placement
                    # in cool stars is uncertain by a few per cent)
                    keep &= data.smooth[cand] - 1.0 >= 3.0 * min_depth
                cand = cand[keep]
            else:
                cand = cand[:0]
        for p in cand:
            # parabolic refinement of the peak position (in pixels)
            frac = 0.0
            if 0 < p < s.size - 1:
                a, b, c = s[p - 1], s[p], s[p + 1]
                den = a - 2 * b + c
                frac = 0.5 * (a - c) / den if den < 0 else 0.0
            pos = float(np.interp(p + np.clip(frac, -0.5, 0.5), np.arange(s.size), data.wave))
            out.append((pos, sign * float(s[p]), 1.0 - float(data.smooth[p]), sign < 0))
    out.sort()
    if not out:
        return np.zeros(0), np.zeros(0), np.zeros(0), np.zeros(0, bool)
    pos, sig, depth, emis = (np.array(v) for v in zip(*out))
    return pos, sig, depth, emis.astype(bool)


def _covered(data, lab_obs):
    """Lines whose observed position lies inside the spectrum with one FWHM to spare."""
    lo = data.wave[0] + data.fwhm[0]
    hi = data.wave[-1] - data.fwhm[-1]
    return (lab_obs > lo) & (lab_obs < hi)


def _blends(waves, ids, fwhm):
    """For each line, the ids of the other listed lines within one resolution element."""
    order = np.argsort(waves)
    ws = waves[order]
    out = [""] * len(waves)
    for i in order:
        lo = np.searchsorted(ws, waves[i] - fwhm[i])
        hi = np.searchsorted(ws, waves[i] + fwhm[i], side="right")
        others = [ids[order[j]] for j in range(lo, hi) if order[j] != i]
        out[i] = ",".join(others)
    return out


def _resolve_rv(data, rv, lab):
    if rv is not None:
        return u.Quantity(rv, u.km / u.s)
    # crude estimate: offsets of the strongest features to their nearest listed line within
    # +-400 km/s (specan choice: wider than the velocities of nearly all Galactic stars,
    # common practice), histogram mode refined by the median around it
    pos, _, _, emis = _features(data, 2 * DETECT_SIGMA)
    if pos.size < 3:
        return 0.0 * u.km / u.s
    keep = ~emis
    pos = pos[keep]
    ls = np.sort(lab)
    j = np.clip(np.searchsorted(ls, pos), 1, ls.size - 1)
    near = np.where(np.abs(ls[j - 1] - pos) < np.abs(ls[j] - pos), ls[j - 1], ls[j])
    v = C_KMS * (pos - near) / near
    v = v[np.abs(v) < 400]
    if v.size < 3:
        return 0.0 * u.km / u.s
    hist, edges = np.histogram(v, bins=np.arange(-400, 401, 25))
    centre = 0.5 * (edges[np.argmax(hist)] + edges[np.argmax(hist) + 1])
    return float(np.median(v[np.abs(v - centre) < 50])) * u.km / u.s


def _lines_in_range(data, linelist, kinds, rv):
    """The listed lines the spectrum covers at velocity ``rv`` (estimated when "auto"/None).

    Returns (table rows, lab wavelengths, predicted wavelengths, rv Quantity,
    predicted wavelengths of the whole list) in the spectrum's medium.
    """
    table = _prepare_list(linelist, kinds)
    lab_all = table[_lab_column(data)].to_value(u.AA)
    rv_q = _resolve_rv(data, rv, lab_all)
    pred_all = lab_all * doppler_factor(rv_q)
    cov = _covered(data, pred_all)
    return table[cov], lab_all[cov], pred_all[cov], rv_q, pred_all


def _prepare_list(linelist, kinds):
    table = load_linelist() if linelist is None else (
        linelist if isinstance(linelist, QTable) else load_linelist(linelist))
    if kinds is not None and "kind" in table.colnames:
        table = table[np.isin(np.asarray(table["kind"]).astype(str), list(kinds))]
    return table


# ----------------------------------------------------------------------------- identify


def identify(spectrum, linelist=None, rv=0 * u.km / u.s, resolving_power=None, window=None,
             detect_sigma=DETECT_SIGMA, strong_depth=0.1, min_depth=MIN_DEPTH, _data=None):
    """Find features and match them to a line list.

    A Gaussian matched filter at the instrument's resolution gives, at each pixel,
    the significance of a line there (fitted amplitude over its error, from the
    error array or DER_SNR). Its peaks above ``detect_sigma`` are features
    (negative peaks: emission). Each listed line is matched to the nearest feature
    within ``window`` of its Doppler-shifted position.

    Parameters
    ----------
    spectrum : specutils.Spectrum
        Normalised or not (then :func:`specan.prepare.prepare` is applied).
    linelist : str, path or QTable, optional
        Default: the packaged ``"stellar"`` list (atomic lines and band heads).
    rv : Quantity or None
        Radial velocity used to shift the list; ``None`` estimates one from the
        offsets of the strongest features to their nearest listed lines.
    resolving_power : float, optional
        Overrides ``info.resolving_power``; when neither is known it is estimated
        from the narrowest lines (see ``meta["resolving_power_source"]``).
    window : Quantity, optional
        Matching half-window in velocity; default one resolution element (c/R),
        at least 20 km/s.
    detect_sigma : float
        Matched-filter significance for a feature.
    strong_depth : float
        Unmatched features at least this deep are reported as unidentified.
    min_depth : float
        Features must stand this far out of the smoothed flux around them.

    Returns
    -------
    astropy.table.QTable
        One row per listed line the spectrum covers (``status`` "identified" or
        "not_found") plus one per strong unidentified feature (``status``
        "unidentified", ``id`` "?" + wavelength). Columns: ``id``, ``species``,
        ``kind``, ``wave_lab`` (in the spectrum's medium), ``wave_pred``,
        ``wave_obs``, ``velocity`` (obs - lab), ``significance``, ``depth``,
        ``emission``, ``blend``, ``status``. ``meta`` holds rv, R and medium.
    """
    # _data: the internal arrays already built from this spectrum (analyse builds them once)
    data = _data if _data is not None else _Data(_normalised(spectrum), resolving_power)
    t, lab, pred, rv_q, pred_all = _lines_in_range(data, linelist, None, rv)
    fwhm_at = np.interp(pred, data.wave, data.line_fwhm)
    if window is None:
        win_kms = np.maximum(C_KMS * fwhm_at / pred, 20.0)
    else:
        win_kms = np.full(pred.shape, u.Quantity(window, u.km / u.s).value)
    win = pred * win_kms / C_KMS

    pos, sig, depth, emis = _features(data, detect_sigma, min_depth)
    ids = [str(i) for i in t["id"]]
    n = len(t)
    wave_obs = np.full(n, np.nan)
    f_sig = np.interp(pred, data.wave, data.signif)
    f_depth = 1.0 - np.interp(pred, data.wave, data.smooth)
    emission = np.zeros(n, bool)
    used = np.zeros(pos.size, bool)
    if pos.size:
        j = np.clip(np.searchsorted(pos, pred), 1, max(pos.size - 1, 1))
        for i in range(n):
            cands = [k for k in (j[i] - 1, j[i]) if 0 <= k < pos.size and abs(pos[k] - pred[i]) <= win[i]]
            if not cands:
                continue
            k = min(cands, key=lambda c: abs(pos[c] - pred[i]))
            wave_obs[i], f_sig[i], f_depth[i], emission[i] = pos[k], sig[k], depth[k], emis[k]
            used[k] = True
    atomic = np.asarray(t["kind"]).astype(str) == "atomic"
    blend = np.array([""] * n, dtype=object)
    if atomic.any():
        idx = np.flatnonzero(atomic)
        b = _blends(pred[idx], [ids[i] for i in idx], fwhm_at[idx])
        for i, s in zip(idx, b):
            blend[i] = s
    found = np.isfinite(wave_obs)
    status = np.where(found, "identified", "not_found").astype(object)
    velocity = C_KMS * (wave_obs - lab) / lab

    # strong features nothing in the list explains
    un = (~used) & (np.abs(depth) >= strong_depth)
    if pred_all.size and un.any():
        near = np.min(np.abs(pred_all[None, :] - pos[un, None]), axis=1)
        fw = np.interp(pos[un], data.wave, data.line_fwhm)
        keep = np.flatnonzero(un)[near > np.maximum(fw, pos[un] * 20.0 / C_KMS)]
    else:
        keep = np.flatnonzero(un)

    ids_all = ids + [f"?{pos[k]:.1f}" for k in keep]
    out = QTable()
    out["id"] = ids_all
    out["species"] = [str(s) for s in t["species"]] + ["?"] * len(keep)
    out["kind"] = [str(s) for s in t["kind"]] + ["unknown"] * len(keep)
    out["wave_lab"] = np.concatenate([lab, np.full(len(keep), np.nan)]) * u.AA
    out["wave_pred"] = np.concatenate([pred, np.full(len(keep), np.nan)]) * u.AA
    out["wave_obs"] = np.concatenate([wave_obs, pos[keep]]) * u.AA
    out["velocity"] = np.concatenate([velocity, np.full(len(keep), np.nan)]) * u.km / u.s
    out["significance"] = np.concatenate([f_sig, sig[keep]])
    out["depth"] = np.concatenate([f_depth, depth[keep]])
    out["emission"] = np.concatenate([emission, emis[keep]])
    out["blend"] = [str(b) for b in blend] + [""] * len(keep)
    out["status"] = [str(s) for s in status] + ["unidentified"] * len(keep)
    out.meta.update(_meta(data, rv_q))
    return out


def _meta(data, rv_q):
    return {"rv": rv_q, "resolving_power": data.resolving_power,
            "resolving_power_source": data.r_source, "medium": data.medium,
            "noise_source": data.noise_source}


# ----------------------------------------------------------------------------- measure


def _window(data, ic, sign, min_half, max_half, wide=False):
    """Adaptive integration window around pixel ``ic``.

    Walk outward on the smoothed flux until it is back at the continuum (within
    its noise), stops falling (a plateau: the local pseudo-continuum of a crowded
    spectrum), or starts to deepen again (a neighbouring line: the edge is put at
    the crest between the two), or ``max_half`` Angstrom is reached.

    Returns
    -------
    lo, hi : int
        Edge pixels.
    levels : (float, float)
        Local continuum at each edge: 1 where the walk reached the continuum, a
        neighbour's crest (wings belong to the line) or the limit, the smoothed
        flux where it stopped on a plateau.
    cut : bool
        True when a neighbouring line cut the window.
    """
    # hydrogen lines walk on a flux smoothed over three line widths: the metal lines in
    # their wings must not end the window
    smooth = data.smooth_wide if wide else data.smooth
    depth = sign * (1.0 - smooth)
    err = data.smooth_wide_err if wide else data.smooth_err
    x0 = data.wave[ic]
    d0 = max(depth[ic], 0.0)
    edges, levels, cut = [], [], False
    for step in (-1, 1):
        i, best_i, best = ic, ic, depth[ic]
        end, level = ic, 1.0
        trail = [ic]  # pixels walked, to look one resolution element back
        while True:
            nxt = i + step
            if nxt < 0 or nxt >= data.wave.size or abs(data.wave[nxt] - x0) > max_half:
                # still falling at the limit: a wing, not a pseudo-continuum
                end, level = i, 1.0
                break
            i = nxt
            trail.append(i)
            di = depth[i]
            dist = abs(data.wave[i] - x0)
            if di < best:
                best, best_i = di, i
            noise = err[i]
            if di <= max(noise, 2e-3) and dist >= min_half:
                end, level = i, 1.0
                break
            if di > best + max(3.0 * noise, 5e-3) and dist >= 0.5 * min_half:
                end, level, cut = best_i, 1.0, True
                break
            if not wide and dist >= 2.0 * min_half:
                # the pixel one instrument FWHM back toward the centre
                back = trail[max(len(trail) - 1 - int(np.ceil(min_half / data.dx[i])), 0)]
                if depth[back] - di < max(2.0 * noise, 0.01 * d0):
                    end, level = i, smooth[i]
                    break
            elif wide and dist >= 10.0 * min_half:
                # hydrogen: Stark wings fall off slowly yet carry much of the EW, so the
                # plateau test looks five widths back and asks for a 10% relative fall
                back = trail[max(len(trail) - 1 - int(np.ceil(5.0 * min_half / data.dx[i])), 0)]
                if depth[back] - di < max(2.0 * noise, 0.1 * di):
                    end, level = i, smooth[i]
                    break
        # a plateau within the noise of the continuum is the continuum
        if abs(1.0 - level) <= 3.0 * err[end]:
            level = 1.0
        edges.append(end)
        levels.append(float(level))
    if edges[0] > edges[1]:
        edges, levels = edges[::-1], levels[::-1]
    return edges[0], edges[1], (levels[0], levels[1]), cut


def _local_continuum(data, lo, hi, levels):
    """Straight line between the two edge levels over pixels ``lo..hi``."""
    x = data.wave[lo:hi + 1]
    if hi == lo:
        return np.full(1, levels[0])
    t = (x - x[0]) / (x[-1] - x[0])
    return levels[0] * (1.0 - t) + levels[1] * t


def _profiles(x, centres, shift, sigma, gamma, profile):
    dx = x[None, :] - (centres[:, None] + shift)
    if profile == "voigt":
        return dx, voigt_profile(dx, sigma, gamma)
    return dx, np.exp(-0.5 * (dx / sigma) ** 2) / (sigma * np.sqrt(2 * np.pi))


def _voigt_and_derivatives(dx, sigma, gamma):
    """Voigt profile and its derivatives in x, sigma and gamma via the Faddeeva function.

    V = Re w(z) / (sigma sqrt(2 pi)), z = (x + i gamma) / (sigma sqrt 2), and
    w'(z) = -2 z w(z) + 2i / sqrt(pi) (Abramowitz & Stegun 7.1.20), so one call of
    ``scipy.special.wofz`` gives the analytic Jacobian of a Voigt fit.
    """
    from scipy.special import wofz

    s2 = sigma * np.sqrt(2.0)
    norm = sigma * np.sqrt(2.0 * np.pi)
    z = (dx + 1j * gamma) / s2
    w = wofz(z)
    dw = -2.0 * z * w + 2j / np.sqrt(np.pi)
    v = w.real / norm
    d_x = dw.real / (s2 * norm)
    d_gamma = -dw.imag / (s2 * norm)
    d_sigma = -(dw * z).real / (sigma * norm) - v / sigma
    return v, d_x, d_sigma, d_gamma


def _fit(data, lo, hi, cont, centres, profile, max_shift, sig_inst, sign=1.0, skip=None, free_width=False):
    """Least-squares profile fit over pixels lo..hi; component 0 is the target.

    Model: ``cont(x) * (1 - sum_k W_k P(x - c_k - shift; sigma[, gamma]))`` with P a
    unit-area Gaussian or Voigt (``scipy.special.voigt_profile``), so each W_k is
    that component's equivalent width. One shift and one width for all components:
    at these resolutions blended lines share the instrumental profile, and free
    widths for overlapping components are degenerate.
    """
    sel = slice(lo, hi + 1)
    x, y = data.wave[sel], data.flux[sel]
    wts = np.sqrt(data.weight[sel])
    if skip is not None:
        wts = np.where(skip, 0.0, wts)
    ncomp = len(centres)
    if (wts > 0).sum() < (3 + ncomp):
        return None
    voigt = profile == "voigt"
    span = max(x[-1] - x[0], 2 * sig_inst)
    w0 = []
    for c in centres:
        d0 = 1.0 - np.interp(c, data.wave, data.smooth) / np.interp(c, x, cont)
        w0.append(d0 * sig_inst * np.sqrt(2 * np.pi) * 1.2)
    wmax = 2.0 * span
    p0 = [0.0, sig_inst] + ([0.2 * sig_inst] if voigt else []) + w0
    # absorption components absorb, emission components emit (a free sign lets
    # neighbouring components cancel each other)
    # (a start value of the wrong sign is clipped into these bounds below)
    w_lo, w_hi = (0.0, wmax) if sign > 0 else (-50.0 * wmax, 0.0)
    # The Gaussian width stays near the spectrum's line width: at these resolutions the
    # instrument (or the star's rotation) sets it, and a free width soaks up the
    # wings of unresolved neighbours. Damping wings go to the Voigt's Lorentzian part.
    lb = [-max_shift, 0.95 * sig_inst] + ([0.0] if voigt else []) + [w_lo] * ncomp
    # (hydrogen: thermal and Stark broadening widen the core beyond the instrument)
    ub = [max_shift, span if free_width else 1.05 * sig_inst] + ([span] if voigt else []) + [w_hi] * ncomp
    lb, ub = np.array(lb), np.array(ub)
    p0 = np.clip(np.array(p0, float), lb + 1e-6 * (ub - lb), ub - 1e-6 * (ub - lb))
    k = 3 if voigt else 2

    def resid(p):
        _, prof = _profiles(x, centres, p[0], p[1], p[2] if voigt else 0.0, profile)
        return (cont * (1.0 - p[k:] @ prof) - y) * wts

    def jac(p):
        # analytic Jacobian of the Gaussian model (hot path: most lines are Gaussian fits)
        dx, prof = _profiles(x, centres, p[0], p[1], 0.0, "gauss")
        sig, ws = p[1], p[k:]
        j = np.empty((x.size, p.size))
        j[:, 0] = -cont * (ws[:, None] * prof * dx / sig**2).sum(axis=0)
        j[:, 1] = -cont * (ws[:, None] * prof * (dx**2 / sig**3 - 1.0 / sig)).sum(axis=0)
        j[:, k:] = -(cont[:, None] * prof.T)
        return j * wts[:, None]

    def jac_voigt(p):
        dx = x[None, :] - (centres[:, None] + p[0])
        v, d_x, d_s, d_g = _voigt_and_derivatives(dx, p[1], p[2])
        ws = p[k:][:, None]
        j = np.empty((x.size, p.size))
        j[:, 0] = cont * (ws * d_x).sum(axis=0)
        j[:, 1] = -cont * (ws * d_s).sum(axis=0)
        j[:, 2] = -cont * (ws * d_g).sum(axis=0)
        j[:, k:] = -(cont[:, None] * v.T)
        return j * wts[:, None]

    try:
        res = least_squares(resid, p0, jac=jac_voigt if voigt else jac, bounds=(lb, ub),
                            x_scale="jac", max_nfev=100, ftol=1e-6, xtol=1e-6, gtol=1e-8)
    except (ValueError, FloatingPointError):
        return None
    if res.status <= 0:
        return None
    p = res.x
    try:
        cov = np.linalg.pinv(res.jac.T @ res.jac)
    except np.linalg.LinAlgError:
        return None
    dof = max(int((wts > 0).sum()) - p.size, 1)
    chi2 = float(np.sum(res.fun**2)) / dof
    w_err = float(np.sqrt(max(cov[k, k], 0.0)))
    sigma = p[1]
    gamma = p[2] if voigt else 0.0
    if voigt:
        fl, fg = 2.0 * gamma, GAUSS_FWHM * sigma
        fwhm = 0.5346 * fl + np.sqrt(0.2166 * fl**2 + fg**2)  # Olivero & Longbothum (1977), from memory
        peak = p[k] * voigt_profile(0.0, sigma, gamma)
    else:
        fwhm = GAUSS_FWHM * sigma
        peak = p[k] / (sigma * np.sqrt(2 * np.pi))
    return {"ew": float(p[k]), "ew_err": w_err, "centre": float(centres[0] + p[0]), "fwhm": float(fwhm),
            "depth": float(peak), "chi2": chi2, "sigma": float(sigma), "gamma": float(gamma)}


def _fit_gauss(data, lo, hi, cont, centres, max_shift, sig_line, sign=1.0):
    """Gaussian components by variable projection (fast path of :func:`_fit`).

    Same model as :func:`_fit` with Gaussian profiles. For fixed shift and width
    the model is linear in the equivalent widths, so they are solved exactly
    (batched normal equations) on a grid of shifts (steps of sigma/4) and widths
    (0.95, 1.00, 1.05 times the line width); the best grid point is refined by a
    parabola in shift. Ten times faster than iterating on all parameters.
    """
    from scipy.optimize import nnls

    sel = slice(lo, hi + 1)
    x, y = data.wave[sel], data.flux[sel]
    wts = np.sqrt(data.weight[sel])
    ncomp = len(centres)
    if (wts > 0).sum() < (3 + ncomp):
        return None
    b = (cont - y) * wts
    cw = cont * wts
    step = sig_line / 4.0
    nsh = int(np.floor(max_shift / step))
    shifts = np.arange(-nsh, nsh + 1) * step
    sigmas = sig_line * np.array([0.95, 1.0, 1.05])
    sh = np.repeat(shifts, sigmas.size)
    sg = np.tile(sigmas, shifts.size)
    dx = x[None, None, :] - (centres[None, :, None] + sh[:, None, None])
    g = np.exp(-0.5 * (dx / sg[:, None, None]) ** 2) / (sg[:, None, None] * np.sqrt(2 * np.pi))
    a = g * cw[None, None, :]
    ata = a @ a.transpose(0, 2, 1) + 1e-12 * np.eye(ncomp)[None]
    atb = a @ b
    try:
        w = np.linalg.solve(ata, atb[..., None])[..., 0]
    except np.linalg.LinAlgError:
        return None
    chi2 = b @ b - np.sum(w * atb, axis=1)
    # grid points whose solution has components of the wrong sign are solved with
    # the sign constraint (NNLS) only if they would win
    order = np.argsort(chi2)
    best = None
    for m in order[:5]:
        wm = w[m]
        if np.all(sign * wm >= 0):
            best, wbest, cbest = m, wm, chi2[m]
            break
        wn, rn = nnls((sign * a[m]).T, b * sign)
        c = rn**2
        if best is None or c < cbest:
            best, wbest, cbest = m, sign * wn, c
    if best is None:
        return None
    shift, sig = sh[best], sg[best]
    # parabola through chi2 at the neighbouring shifts (same width)
    same = np.flatnonzero(sg == sig)
    k = int(np.flatnonzero(same == best)[0])
    if 0 < k < same.size - 1:
        c0, c1, c2 = chi2[same[k - 1]], chi2[same[k]], chi2[same[k + 1]]
        den = c0 - 2 * c1 + c2
        if den > 0:
            shift = shift + step * float(np.clip(0.5 * (c0 - c2) / den, -0.5, 0.5))
    try:
        cov = np.linalg.inv(ata[best])
    except np.linalg.LinAlgError:
        return None
    dof = max(int((wts > 0).sum()) - ncomp - 2, 1)
    peak = wbest[0] / (sig * np.sqrt(2 * np.pi))
    return {"ew": float(wbest[0]), "ew_err": float(np.sqrt(max(cov[0, 0], 0.0))),
            "centre": float(centres[0] + shift), "fwhm": float(GAUSS_FWHM * sig), "depth": float(peak),
            "chi2": float(cbest) / dof, "sigma": float(sig), "gamma": 0.0}


def measure(spectrum, linelist=None, rv=0 * u.km / u.s, resolving_power=None, profile="auto",
            window=None, detect_sigma=DETECT_SIGMA, kinds=("atomic",), min_depth=MIN_DEPTH,
            divide_hydrogen=True, _data=None):
    """Measure every listed line the spectrum covers.

    Per line: the centre is the matched feature (see :func:`identify`) or the
    Doppler-shifted laboratory wavelength. The equivalent width is integrated
    directly over an adaptive window (outward until the smoothed flux is back at
    the continuum, levels off on a pseudo-continuum, or a neighbouring line
    begins; the local continuum is taken from the window edges) and fitted with a
    profile (one component per listed line and per unlisted feature inside the
    window; shared shift and width, the width held near the spectrum's line
    width). ``ew`` is the direct integral for isolated lines and the fit when the
    window was cut by a neighbour or holds other components (``method`` says
    which); hydrogen lines are always integrated (their fit is in ``ew_fit``).
    Hydrogen is measured first and its fitted profiles divided out before the
    other lines are measured, so lines in Balmer wings are measured against the
    wing. Lines with no feature found are not ``detected``; their EW is
    integrated over +-1 line width against the local level (an upper limit).
    Uncertainties: ``ew_err`` from the error array (or DER_SNR noise), and
    ``ew_err_cayrel`` from Cayrel (1988). Emission lines get negative equivalent
    widths and ``emission`` True.

    Parameters
    ----------
    spectrum : specutils.Spectrum
        Normalised or not (then :func:`specan.prepare.prepare` is applied).
    linelist : str, path or QTable, optional
        Default: the packaged ``"stellar"`` list.
    rv : Quantity or None
        Radial velocity of the star (``None``: estimated, see :func:`identify`).
    resolving_power : float, optional
        Overrides ``info.resolving_power``.
    profile : {"auto", "gauss", "voigt"}
        Fitted profile; ``"auto"`` uses Voigt for hydrogen lines and for very deep
        (> 0.7) lines with windows over four line widths wide, Gaussian otherwise.
    window : Quantity, optional
        Matching half-window in velocity (see :func:`identify`).
    detect_sigma : float
        Matched-filter significance above which a line is ``detected``.
    kinds : sequence of str
        Line-list ``kind`` values to measure (band heads are measured by
        :func:`band_indices`).
    min_depth : float
        Features must stand this far out of the smoothed flux around them.
    divide_hydrogen : bool
        Measure the other lines on the spectrum divided by the fitted hydrogen
        profiles (hydrogen lines with a listed low-excitation line closer than 0.6
        line widths, such as H epsilon and Ca II H, are left in).

    Returns
    -------
    astropy.table.QTable
        Columns ``id``, ``species``, ``wave_air``, ``wave_vac``, ``wave_obs``,
        ``velocity``, ``ew``, ``ew_err``, ``ew_err_cayrel``, ``ew_int``,
        ``ew_int_err``, ``ew_fit``, ``ew_fit_err``, ``fwhm``, ``depth``,
        ``significance``, ``fit_chi2``, ``window_min``, ``window_max``, ``method``,
        ``profile``, ``blend``, ``detected``, ``emission``; ``meta`` holds rv, R and
        medium. ``fit_chi2`` is the reduced chi-square of the profile fit (NaN when
        none was fitted): near 1 when noise limits the line; far above 1 when the
        profile model does (unresolved blends), and the errors, which count noise
        only, then understate the equivalent width's true uncertainty.
    """
    if profile not in ("auto", "gauss", "voigt"):
        raise ValueError("profile must be 'auto', 'gauss' or 'voigt'")
    # _data: the internal arrays already built from this spectrum (analyse builds them once)
    data = _data if _data is not None else _Data(_normalised(spectrum), resolving_power)
    t, lab, pred, rv_q, pred_all = _lines_in_range(data, linelist, kinds, rv)
    ids = [str(i) for i in t["id"]]
    species = [str(s) for s in t["species"]]
    n = len(t)
    fwhm_at = np.interp(pred, data.wave, data.line_fwhm)
    win_kms = (np.maximum(C_KMS * fwhm_at / pred, 20.0) if window is None
               else np.full(n, u.Quantity(window, u.km / u.s).value))
    win = pred * win_kms / C_KMS
    blend = _blends(pred, ids, fwhm_at) if n else []
    pos, _, _, femis = _features(data, detect_sigma, min_depth)
    is_h = np.array([s == "H I" for s in species], bool)

    cols = {k: np.full(n, np.nan) for k in ("wave_obs", "ew", "ew_err", "ew_err_cayrel", "ew_int",
                                             "ew_int_err", "ew_fit", "ew_fit_err", "fwhm", "depth",
                                             "significance", "window_min", "window_max", "fit_chi2")}
    method = np.array(["none"] * n, dtype=object)
    prof_used = np.array([""] * n, dtype=object)
    detected = np.zeros(n, bool)
    emission = np.zeros(n, bool)

    def one(i, data, pos, femis):
        centre, max_shift, matched = pred[i], win[i], False
        if pos.size:
            k = int(np.argmin(np.abs(pos - pred[i])))
            if abs(pos[k] - pred[i]) <= win[i]:
                # a matched feature fixes the centre; the fit may only refine it (a wide
                # shift would let blended components trade places)
                centre, max_shift, matched = pos[k], 0.5 * fwhm_at[i], True
        ic = data.index(centre)
        if ic > 0 and abs(data.wave[ic - 1] - centre) < abs(data.wave[ic] - centre):
            ic -= 1
        fw = fwhm_at[i]
        core = np.abs(data.wave - centre) <= 0.5 * fw
        if not data.good[core].any():
            method[i] = "masked"
            return
        s_c = float(data.signif[ic])
        sign = -1.0 if s_c < -detect_sigma else 1.0
        cols["significance"][i] = s_c
        # a line is detected where identification found a feature for it (significant in
        # the matched filter and standing out of its surroundings by min_depth)
        detected[i] = matched and sign * s_c >= detect_sigma
        emission[i] = sign < 0
        max_half = max(25.0 * fw, 80.0) if is_h[i] else 25.0 * fw
        if matched:
            lo, hi, levels, cut = _window(data, ic, sign, fw, max_half, wide=bool(is_h[i]))
        else:
            # nothing found here: integrate +-1 line width against the local level around it
            # (an upper limit; inside another line's wing that wing is the continuum)
            lo = int(np.searchsorted(data.wave, centre - fw))
            hi = int(np.clip(np.searchsorted(data.wave, centre + fw), lo + 1, data.wave.size - 1))
            lo = min(lo, hi - 1)
            levels, cut = (float(data.smooth[lo]), float(data.smooth[hi])), False
        sel = slice(lo, hi + 1)
        cont = _local_continuum(data, lo, hi, levels)
        ew_int = float(np.sum((1.0 - data.flux[sel] / cont) * data.dx[sel]))
        sig_sel = data.sigma[sel]
        ok = np.isfinite(sig_sel)
        ew_int_err = float(np.sqrt(np.sum(np.where(ok, sig_sel / cont * data.dx[sel], 0.0) ** 2)))
        cols["ew_int"][i], cols["ew_int_err"][i] = ew_int, ew_int_err
        cols["window_min"][i], cols["window_max"][i] = data.wave[lo], data.wave[hi]
        # the deepest (or highest) pixel near the centre
        near = slice(max(ic - 1, 0), min(ic + 2, data.wave.size))
        fl = data.flux[near]
        c_mid = float(np.interp(centre, data.wave[sel], cont))
        cols["depth"][i] = 1.0 - (fl.min() if sign > 0 else fl.max()) / c_mid
        cols["wave_obs"][i] = centre
        # companions: other listed lines of the same broadness class inside the window, and
        # detected features there that no listed line explains (deblending, common practice)
        inside = np.flatnonzero((pred >= data.wave[lo]) & (pred <= data.wave[hi]) & (is_h == is_h[i]))
        inside = [j for j in inside if j != i]
        shift = centre - pred[i]
        centres = [centre]
        # lines closer than 0.6 line widths cannot be told apart: they stay one component
        # (the target's EW is then theirs together, and ``blend`` names them)
        candidates = [pred[j] + shift for j in inside]
        in_win = pos[(pos >= data.wave[lo]) & (pos <= data.wave[hi]) & (femis == (sign < 0))] if pos.size \
            else np.zeros(0)
        if not is_h[i]:
            candidates += list(in_win)
        for c in candidates:
            if min(abs(c - x) for x in centres) > 0.6 * fw:
                centres.append(c)
        # hydrogen profiles are fitted around the metal lines in their wings: those
        # pixels get no weight (a shared Voigt width would give each metal line Stark wings)
        # (the features found there, and the listed lines, which on a steep wing may
        # make no local minimum of their own)
        skip = None
        if is_h[i]:
            listed = pred[(~is_h) & (pred >= data.wave[lo]) & (pred <= data.wave[hi])] + shift
            others = np.concatenate([in_win, listed])
            if others.size:
                xw = data.wave[lo:hi + 1]
                far = np.abs(others[:, None] - np.asarray(centres)[None, :]).min(axis=1) > 0.6 * fw
                if far.any():
                    skip = (np.abs(xw[None, :] - others[far][:, None]) < 1.2 * fw).any(axis=0)
        n_extra = len(centres) - 1
        centres = np.array(centres)
        # strong lines with damping wings: deep core and a window many widths wide
        strong = cols["depth"][i] > 0.7 and (data.wave[hi] - data.wave[lo]) > 4.0 * fw
        use_voigt = profile == "voigt" or (profile == "auto" and (is_h[i] or strong))
        fit = None
        if detected[i]:
            if use_voigt:
                fit = _fit(data, lo, hi, cont, centres, "voigt", max_shift, fw / GAUSS_FWHM, sign, skip,
                           free_width=bool(is_h[i]))
            else:
                fit = _fit_gauss(data, lo, hi, cont, centres, max_shift, fw / GAUSS_FWHM, sign)
        if fit is not None:
            fits[i] = dict(fit, profile="voigt" if use_voigt else "gauss", sign=sign, ew_int=ew_int)
            cols["ew_fit"][i], cols["ew_fit_err"][i] = fit["ew"], fit["ew_err"]
            cols["fit_chi2"][i] = fit["chi2"]
            cols["fwhm"][i] = fit["fwhm"]
            cols["wave_obs"][i] = fit["centre"]
            prof_used[i] = "voigt" if use_voigt else "gauss"
        else:
            cols["fwhm"][i] = _half_width(data, ic, lo, hi, sign)
        # hydrogen lines are integrated: on real low-resolution spectra the continuum
        # errors under their broad wings make free Voigt fits unreliable (measured on the
        # JHC library); the fit is reported in ew_fit and used to divide hydrogen out
        if fit is not None and (cut or n_extra) and not is_h[i]:
            method[i] = ("multi_" if n_extra else "") + prof_used[i] + "_fit"
            cols["ew"][i], cols["ew_err"][i] = fit["ew"], fit["ew_err"]
        else:
            method[i] = "integration"
            cols["ew"][i], cols["ew_err"][i] = ew_int, ew_int_err
        # significant in the matched filter AND an equivalent width clear of its error
        detected[i] = detected[i] and abs(cols["ew"][i]) > 2.0 * cols["ew_err"][i]
        fwhm_c = cols["fwhm"][i] if np.isfinite(cols["fwhm"][i]) else fw
        noise = np.median(sig_sel[np.isfinite(sig_sel)]) if np.isfinite(sig_sel).any() else np.nan
        cols["ew_err_cayrel"][i] = cayrel_error(fwhm_c, data.dx[ic], 1.0 / noise)
    fits = {}
    # Hydrogen first: the other lines are then measured on the spectrum divided by the
    # fitted hydrogen profiles, so a metal line in a Balmer wing is measured against the
    # wing (its local continuum), not against a continuum the wing lies far below.
    for i in np.flatnonzero(is_h):
        one(i, data, pos, femis)
    data_m, pos_m, femis_m = data, pos, femis
    if divide_hydrogen:
        model = _hydrogen_model(data, fits, pred, fwhm_at, is_h, detected, t["ep_low"].to_value(u.eV))
        if model is not None:
            data_m = data.divided(model)
            pos_m, _, _, femis_m = _features(data_m, detect_sigma, min_depth)
    for i in np.flatnonzero(~is_h):
        one(i, data_m, pos_m, femis_m)
    velocity = C_KMS * (cols["wave_obs"] - lab) / lab

    out = QTable()
    out["id"] = ids
    out["species"] = species
    out["wave_air"] = t["wave_air"].to(u.AA)
    out["wave_vac"] = t["wave_vac"].to(u.AA)
    out["wave_obs"] = cols["wave_obs"] * u.AA
    out["velocity"] = velocity * u.km / u.s
    for name in ("ew", "ew_err", "ew_err_cayrel", "ew_int", "ew_int_err", "ew_fit", "ew_fit_err", "fwhm"):
        out[name] = cols[name] * u.AA
    out["depth"] = cols["depth"]
    out["significance"] = cols["significance"]
    out["fit_chi2"] = cols["fit_chi2"]
    out["window_min"] = cols["window_min"] * u.AA
    out["window_max"] = cols["window_max"] * u.AA
    out["method"] = [str(m) for m in method]
    out["profile"] = [str(p) for p in prof_used]
    out["blend"] = [str(b) for b in blend]
    out["detected"] = detected
    out["emission"] = emission
    out.meta.update(_meta(data, rv_q))
    return out


def _half_width(data, ic, lo, hi, sign):
    """FWHM from the half-depth crossings of the data (no fit available)."""
    d = sign * (1.0 - data.flux[lo:hi + 1])
    j = ic - lo
    if d.size < 3 or d[j] <= 0:
        return np.nan
    half = 0.5 * d[j]
    x = data.wave[lo:hi + 1]
    left = np.flatnonzero(d[:j] < half)
    right = np.flatnonzero(d[j:] < half)
    if not left.size or not right.size:
        return np.nan
    a = left[-1]
    b = j + right[0]
    xl = np.interp(half, [d[a], d[a + 1]], [x[a], x[a + 1]]) if d[a + 1] != d[a] else x[a]
    xr = np.interp(half, [d[b], d[b - 1]], [x[b], x[b - 1]]) if d[b - 1] != d[b] else x[b]
    return float(xr - xl)


# ----------------------------------------------------------------------------- band indices


def _pixel_edges(wave):
    mid = 0.5 * (wave[1:] + wave[:-1])
    return np.concatenate([[1.5 * wave[0] - 0.5 * wave[1]], mid, [1.5 * wave[-1] - 0.5 * wave[-2]]])


def _overlap(edges, lo, hi):
    """Length of each pixel inside [lo, hi] (fractional pixels at the window ends)."""
    return np.clip(np.minimum(edges[1:], hi) - np.maximum(edges[:-1], lo), 0.0, None)


def _window_mean(edges, flux, sigma, good, lo, hi):
    """Mean flux over [lo, hi] weighted by pixel overlap, and its standard error."""
    dx = _overlap(edges, lo, hi) * good
    if np.count_nonzero(dx) < 2:
        return np.nan, np.nan
    m = np.sum(flux * dx) / dx.sum()
    e = np.sqrt(np.sum((np.where(dx > 0, sigma, 0.0) * dx) ** 2)) / dx.sum()
    return float(m), float(e)


def band_indices(spectrum, bands=None, rv=0 * u.km / u.s):
    """Band indices: a feature window against a pseudo-continuum through side windows.

    The pseudo-continuum is the straight line through the mean fluxes of the blue and
    red windows at their centres (Lick convention, Worthey et al. 1994, from memory); with one
    window it is flat. ``kind`` "ew": integral of (1 - F/Fc) in Angstrom;
    "magnitude": -2.5 log10 of the mean of F/Fc over the feature; "ratio": the mean
    of F/Fc. Errors propagate the pixel errors of the feature and of both windows.

    Parameters
    ----------
    spectrum : specutils.Spectrum
        Normalised or not; a normalised one with ``meta["continuum"]`` is measured on
        flux x continuum, since index definitions refer to the observed flux.
    bands : str, path or QTable, optional
        Default: the packaged ``"bands"`` list.
    rv : Quantity
        Radial velocity; the windows are shifted by it.

    Returns
    -------
    astropy.table.QTable
        ``name``, ``value``, ``err``, ``unit`` ("Angstrom", "mag" or ""), ``kind``,
        ``source``; NaN where the spectrum misses a window.
    """
    table = load_bands() if bands is None else (bands if isinstance(bands, QTable) else load_bands(bands))
    info = get_info(spectrum)
    wave = np.asarray(spectrum.spectral_axis.to_value(u.AA), float)
    flux = np.asarray(spectrum.flux.value, float)
    sigma = None
    if spectrum.uncertainty is not None:
        sigma = np.asarray(spectrum.uncertainty.represent_as(StdDevUncertainty).array, float)
    if info.normalized and "continuum" in spectrum.meta:
        cont = np.asarray(u.Quantity(spectrum.meta["continuum"]).value, float)
        if cont.shape == flux.shape:
            flux = flux * cont
            sigma = None if sigma is None else sigma * cont
    bad = ~np.isfinite(flux)
    if spectrum.mask is not None:
        bad |= np.asarray(spectrum.mask, bool)
    if sigma is None:
        # DER_SNR per-pixel noise (Stoehr et al. 2008), relative to the local flux. Written
        # here rather than specutils' snr_derived, which gives one S/N against the median flux:
        # un-normalised flux varies across the bands, so each pixel's difference is scaled by
        # its own flux first.
        f = np.where(bad, np.nan, flux)
        dd = np.abs(2.0 * f[2:-2] - f[:-4] - f[4:]) / np.abs(f[2:-2])
        rel = 1.482602 / np.sqrt(6.0) * np.nanmedian(dd) if np.isfinite(dd).any() else 0.0
        sigma = np.abs(flux) * rel
    bad |= ~np.isfinite(sigma)
    good = ~bad
    flux = np.where(good, flux, 0.0)
    sigma = np.where(good, sigma, 0.0)
    edges_px = _pixel_edges(wave)
    suffix = "_vac" if info.medium == "vacuum" else "_air"
    factor = doppler_factor(rv)
    names, values, errs, units = [], [], [], []
    for row in table:
        def edge(name, row=row):
            return float(u.Quantity(row[name + suffix], u.AA).value) * factor

        fmin, fmax = edge("feature_min"), edge("feature_max")
        windows = []
        for side in ("blue", "red"):
            lo, hi = edge(f"{side}_min"), edge(f"{side}_max")
            if np.isfinite(lo) and np.isfinite(hi):
                m, e = _window_mean(edges_px, flux, sigma, good, lo, hi)
                windows.append((0.5 * (lo + hi), m, e))
        kind = str(row["kind"])
        names.append(str(row["name"]))
        units.append({"ew": "Angstrom", "magnitude": "mag", "ratio": ""}[kind])
        dx_all = _overlap(edges_px, fmin, fmax) * good
        sel = dx_all > 0
        covered = (edges_px[0] <= fmin) and (edges_px[-1] >= fmax)
        masked_frac = 1.0 - dx_all.sum() / (fmax - fmin)
        if (not windows or sel.sum() < 2 or not covered or masked_frac > 0.2
                or not all(np.isfinite(w[1]) for w in windows)):
            values.append(np.nan)
            errs.append(np.nan)
            continue
        x, f, s = wave[sel], flux[sel], sigma[sel]
        dx = dx_all[sel]
        if len(windows) == 2:
            (xb, mb, eb), (xr, mr, er) = windows
            t = (x - xb) / (xr - xb)
        else:
            (xb, mb, eb), (mr, er) = windows[0], (windows[0][1], 0.0)
            t = np.zeros_like(x)
        fc = mb * (1.0 - t) + mr * t
        ratio = f / fc
        # derivatives of sum(ratio*dx) with respect to the two window means
        d_mb = -np.sum(f * dx * (1.0 - t) / fc**2)
        d_mr = -np.sum(f * dx * t / fc**2)
        var_sum = np.sum((s * dx / fc) ** 2) + (d_mb * eb) ** 2 + (d_mr * er) ** 2
        total = np.sum(ratio * dx)
        width = dx.sum()
        if kind == "ew":
            values.append(float(width - total))
            errs.append(float(np.sqrt(var_sum)))
        elif kind == "magnitude":
            mean = total / width
            values.append(float(-2.5 * np.log10(mean)) if mean > 0 else np.nan)
            errs.append(float(2.5 / np.log(10) * np.sqrt(var_sum) / width / mean) if mean > 0 else np.nan)
        else:
            values.append(float(total / width))
            errs.append(float(np.sqrt(var_sum) / width))
    out = QTable()
    out["name"] = names
    out["value"] = values
    out["err"] = errs
    out["unit"] = units
    out["kind"] = [str(k) for k in table["kind"]]
    out["source"] = [str(s) for s in table["source"]]
    out.meta["rv"] = u.Quantity(rv, u.km / u.s)
    out.meta["medium"] = info.medium
    return out


def analyse(spectrum, linelist=None, bands=None, rv=0 * u.km / u.s, resolving_power=None,
            unidentified=True, **options):
    """Lines, band indices and unidentified features of one spectrum, preparing it once.

    Parameters
    ----------
    spectrum : specutils.Spectrum
    linelist, bands : str, path or QTable, optional
        Line list for :func:`measure`, band definitions for :func:`band_indices`.
    rv : Quantity or None
        Radial velocity (``None``: estimated by :func:`measure`; the indices use it too).
    resolving_power : float, optional
    unidentified : bool
        Also run :func:`identify` and return its unidentified strong features.
    **options
        Passed to :func:`measure`.

    Returns
    -------
    dict
        ``{"lines": QTable from measure, "indices": QTable from band_indices,
        "unidentified": rows of identify with status "unidentified" (or None)}``.
    """
    spec = _normalised(spectrum)
    data = _Data(spec, resolving_power)   # built once for measure and identify (~30 ms)
    table = measure(spec, linelist, rv=rv, resolving_power=resolving_power, _data=data, **options)
    indices = band_indices(spec, bands, rv=table.meta["rv"])
    unknown = None
    if unidentified:
        ident = identify(spec, linelist, rv=table.meta["rv"], resolving_power=resolving_power, _data=data,
                         **{k: v for k, v in options.items() if k in ("window", "detect_sigma", "min_depth")})
        unknown = ident[np.asarray(ident["status"]) == "unidentified"]
    return {"lines": table, "indices": indices, "unidentified": unknown}

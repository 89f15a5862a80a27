"""Line identification: features of the spectrum matched to a line list."""

from __future__ import annotations

from typing import NamedTuple

import astropy.units as u
import numpy as np
from astropy.table import QTable

from ..doppler import C_KMS
from .data import DETECT_SIGMA, MIN_DEPTH, LineData, find_features, normalised
from .listed import blends, line_widths, lines_in_range, match_windows, velocities

__all__ = ["identify"]


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
    data = _data if _data is not None else LineData(normalised(spectrum), resolving_power)
    listed = lines_in_range(data, linelist, None, rv)
    fwhm_at = line_widths(data, listed.pred)
    features = find_features(data, detect_sigma, min_depth)
    matches = _match(data, listed.pred, match_windows(listed.pred, fwhm_at, window), features)
    blend = _atomic_blends(listed.rows, listed.pred, fwhm_at)
    unknown = _unexplained(data, features, matches.used, listed.pred_all, strong_depth)
    return _identification_table(data, listed, matches, blend, features, unknown)


class _Matches(NamedTuple):
    """Each listed line's matched feature (NaN position where none), and the features used."""

    wave_obs: np.ndarray
    significance: np.ndarray
    depth: np.ndarray
    emission: np.ndarray
    used: np.ndarray  #: per feature


def _match(data, pred, win, features):
    """The nearest feature within ``win`` of each predicted position.

    Lines with no feature keep the matched filter's significance and the smoothed
    depth at their predicted position.
    """
    pos, sig, depth, emis = features
    n = pred.size
    wave_obs = np.full(n, np.nan)
    f_sig = np.interp(pred, data.wave, data.signif)
    f_depth = 1.0 - np.interp(pred, data.wave, data.smooth)
    emission = np.zeros(n, bool)
    used = np.zeros(pos.size, bool)
    if pos.size:
        j = np.minimum(np.maximum(np.searchsorted(pos, pred), 1), max(pos.size - 1, 1))
        for i in range(n):
            cands = [k for k in (j[i] - 1, j[i]) if 0 <= k < pos.size and abs(pos[k] - pred[i]) <= win[i]]
            if not cands:
                continue
            k = min(cands, key=lambda c: abs(pos[c] - pred[i]))
            wave_obs[i], f_sig[i], f_depth[i], emission[i] = pos[k], sig[k], depth[k], emis[k]
            used[k] = True
    return _Matches(wave_obs, f_sig, f_depth, emission, used)


def _atomic_blends(rows, pred, fwhm_at):
    """:func:`blends` among the atomic lines (band heads blend with nothing)."""
    ids = [str(i) for i in rows["id"]]
    atomic = np.asarray(rows["kind"]).astype(str) == "atomic"
    blend = np.array([""] * len(rows), dtype=object)
    if atomic.any():
        idx = np.flatnonzero(atomic)
        b = blends(pred[idx], [ids[i] for i in idx], fwhm_at[idx])
        for i, s in zip(idx, b):
            blend[i] = s
    return blend


def _unexplained(data, features, used, pred_all, strong_depth):
    """Indices of strong features that nothing in the list explains.

    A feature is explained by any listed line (covered or not) within one line width,
    or 20 km/s where that is wider.
    """
    pos, depth = features.position, features.depth
    un = (~used) & (np.abs(depth) >= strong_depth)
    if pred_all.size and un.any():
        near = np.min(np.abs(pred_all[None, :] - pos[un, None]), axis=1)
        fw = np.interp(pos[un], data.wave, data.line_fwhm)
        return np.flatnonzero(un)[near > np.maximum(fw, pos[un] * 20.0 / C_KMS)]
    return np.flatnonzero(un)


def _identification_table(data, listed, matches, blend, features, keep):
    """One row per listed line, then one per unidentified feature (indices ``keep``)."""
    t, lab, pred = listed.rows, listed.lab, listed.pred
    pos, sig, depth, emis = features
    found = np.isfinite(matches.wave_obs)
    status = np.where(found, "identified", "not_found").astype(object)
    ids = [str(i) for i in t["id"]]
    none = np.full(len(keep), np.nan)
    out = QTable()
    out["id"] = ids + [f"?{pos[k]:.1f}" for k in keep]
    out["species"] = [str(s) for s in t["species"]] + ["?"] * len(keep)
    out["kind"] = [str(s) for s in t["kind"]] + ["unknown"] * len(keep)
    out["wave_lab"] = np.concatenate([lab, none]) * u.AA
    out["wave_pred"] = np.concatenate([pred, none]) * u.AA
    out["wave_obs"] = np.concatenate([matches.wave_obs, pos[keep]]) * u.AA
    out["velocity"] = np.concatenate([velocities(matches.wave_obs, lab), none]) * u.km / u.s
    out["significance"] = np.concatenate([matches.significance, sig[keep]])
    out["depth"] = np.concatenate([matches.depth, depth[keep]])
    out["emission"] = np.concatenate([matches.emission, emis[keep]])
    out["blend"] = [str(b) for b in blend] + [""] * len(keep)
    out["status"] = [str(s) for s in status] + ["unidentified"] * len(keep)
    out.meta.update(data.meta(listed.rv))
    return out

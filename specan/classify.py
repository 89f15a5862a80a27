"""MK classification from line ratios and band depths, calibrated on standards.

Criteria
--------
Every criterion is a *three-band index*: the mean flux in a feature band divided
by a straight pseudo-continuum drawn between the mean fluxes of a blue and a
red side band, ``depth = 1 - F_feature / F_pseudo``. A straight line through two
nearby bands removes any smooth slope, so interstellar reddening and
flux-calibration errors enter only through their curvature inside the window
(E(B-V) = 1.5 with the CCM89 law moves the widest Balmer indices, 150 A
baselines, by about 0.01, under half their scatter among the standards), and
whether the input is continuum-normalised or not does not matter. Side bands are
not always true continuum (in M stars nothing is); what matters is that the
calibration and the star are measured the same way. A few criteria are ratios
of two features, ``ln((1 - d_a) / (1 - d_b))``, which is how the MK criteria are
stated (He II 4541 against He I 4471, Ca II K against H+Heps...).

The feature list follows the MK classification criteria as set out by Morgan,
Keenan and successors and collected in Gray & Corbally (2009, "Stellar Spectral
Classification", Princeton; from memory), adapted to the ~4.5 A resolution of
the default calibration: single weak lines are blended, so we use band depths
and ratios of strong features. Band limits of the Lick indices are those of
Worthey et al. (1994, ApJS 94, 687; from memory).

Calibration
-----------
:class:`Calibration` learns, for every criterion, its mean value as a smooth
function of type code (O0 = 0 ... M0 = 60, :mod:`specan.mktypes`) and
luminosity class (I..V as 1..5), and its scatter about that mean, from a
labelled set of standards (kernel-weighted local regression on a grid of codes).
A spectrum is classified by a weighted Student-t likelihood of its criteria on
the lattice of (code, class), with a free line-strength scale per half of the
spectrum (instruments differ in scattered light and line-spread wings); the
mode of the marginal code posterior gives the type, the posterior (tempered by
a factor learnt in internal cross-validation, because the criteria are
correlated) gives the subclass uncertainty and the class probabilities.

Before measuring, the spectrum is shifted to rest with :mod:`specan.velocity`
and smoothed to the calibration's resolution (constant FWHM in Angstrom).
"""

from __future__ import annotations

import functools
import json
from datetime import datetime, timezone
from importlib import resources
from pathlib import Path

import astropy.units as u
import numpy as np
from scipy.integrate import cumulative_trapezoid

from .errors import AnalysisError, ReadError
from .doppler import doppler_factor
from .lines import estimate_resolving_power
from .mkscales import teff_from_type
from .mktypes import code_to_sptype, lumclass_to_number, marks_emission, number_to_lumclass, sptype_to_code
from .obsinfo import get_info, wavelength_in
from .resolution import smooth_to_fwhm

#: Flags :func:`classify` may raise (the ``flags`` list holds those raised).
FLAGS = ("low_snr", "out_of_range", "peculiar", "emission", "composite")

FORMAT_NAME = "specan-mk-calibration"
FORMAT_VERSION = 1
DEFAULT_FILE = "calibration_jhc1984.json"

__all__ = [
    "CRITERIA",
    "RATIOS",
    "FLAGS",
    "criteria_names",
    "measure_criteria",
    "spectrum_criteria",
    "Calibration",
    "calibrate_catalog",
    "default_calibration",
    "classify",
]

# ---------------------------------------------------------------------------
# Criteria. Wavelengths in air, Angstrom. (feature, blue side band, red side band);
# a feature may be a tuple of several bands whose mean flux is used.
# ---------------------------------------------------------------------------

#: name -> dict(feature=[(lo, hi), ...], blue=(lo, hi), red=(lo, hi), tracks=..., source=...)
#: Not used: the O I 7774 triplet and the Ca II infrared triplet (beyond the 7440 A end of the
#: default library), Na I D (interstellar absorption in reddened OB stars would pose as a
#: stellar feature), single weak lines such as Y II 4376 (blended at 4.5 A).
CRITERIA = {
    # --- Hot stars: helium, ionisation balance -------------------------------------
    "heii_4541": dict(feature=[(4535.0, 4548.0)], blue=(4518.0, 4528.0), red=(4580.0, 4590.0),
                      tracks="O types (He II present only in O stars)",
                      source="Gray & Corbally (2009) ch. 3, He II 4541 vs He I 4471 (from memory)"),
    "heii_4686": dict(feature=[(4680.0, 4692.0)], blue=(4660.0, 4672.0), red=(4697.0, 4709.0),
                      tracks="O types; weakened or in emission in O supergiants (Of)",
                      source="Gray & Corbally (2009) ch. 3, He II 4686 luminosity effect (from memory)"),
    "heii_5411": dict(feature=[(5404.0, 5418.0)], blue=(5385.0, 5397.0), red=(5425.0, 5437.0),
                      tracks="O types", source="He II 5411 (common practice)"),
    "hei_4026": dict(feature=[(4020.0, 4032.0)], blue=(4004.0, 4014.0), red=(4034.0, 4040.0),
                     tracks="B types (He I peaks near B2)",
                     source="Gray & Corbally (2009) ch. 4, He I 4026 (from memory)"),
    "hei_4387": dict(feature=[(4382.0, 4393.0)], blue=(4367.0, 4377.0), red=(4396.0, 4406.0),
                     tracks="B types", source="Gray & Corbally (2009) ch. 4 (from memory)"),
    "hei_4471": dict(feature=[(4465.0, 4477.0)], blue=(4452.0, 4462.0), red=(4490.0, 4500.0),
                     tracks="O late to B; He I 4471 / Mg II 4481 falls through late B",
                     source="Gray & Corbally (2009) ch. 4, He I 4471 vs Mg II 4481 (from memory)"),
    "mgii_4481": dict(feature=[(4478.0, 4487.0)], blue=(4452.0, 4462.0), red=(4490.0, 4500.0),
                      tracks="late B to F", source="Gray & Corbally (2009) ch. 4 (from memory)"),
    "hei_4922": dict(feature=[(4915.0, 4929.0)], blue=(4898.0, 4910.0), red=(4932.0, 4944.0),
                     tracks="B types", source="He I 4922 (common practice)"),
    "hei_5876": dict(feature=[(5869.0, 5882.0)], blue=(5850.0, 5864.0), red=(5903.0, 5915.0),
                     tracks="O and B types (red side band avoids Na D)",
                     source="He I 5876 (common practice)"),
    "hei_6678": dict(feature=[(6672.0, 6685.0)], blue=(6652.0, 6665.0), red=(6690.0, 6703.0),
                     tracks="B types", source="He I 6678 (common practice)"),
    "siiii_4552": dict(feature=[(4549.0, 4557.0)], blue=(4518.0, 4528.0), red=(4580.0, 4590.0),
                       tracks="early B (Si III), later Ba II 4554 in F-G supergiants",
                       source="Gray & Corbally (2009) ch. 4, Si III 4552 (from memory)"),
    # --- Hydrogen: strength (temperature) and wings (gravity) -----------------------
    "hdelta": dict(feature=[(4083.5, 4122.25)], blue=(4041.6, 4079.75), red=(4128.5, 4161.0),
                   tracks="peaks near A2; wide band includes the wings",
                   source="Lick HdeltaA bands, Worthey & Ottaviani (1997) (from memory)"),
    "hdelta_core": dict(feature=[(4097.0, 4107.0)], blue=(4041.6, 4079.75), red=(4128.5, 4161.0),
                        tracks="core depth: deep and narrow in supergiants",
                        source="Gray & Corbally (2009) ch. 5, Balmer profile luminosity effect (from memory)"),
    "hgamma": dict(feature=[(4319.75, 4363.5)], blue=(4283.5, 4319.75), red=(4367.25, 4419.75),
                   tracks="Balmer strength incl. wings",
                   source="Lick HgammaA bands, Worthey & Ottaviani (1997) (from memory)"),
    "hgamma_core": dict(feature=[(4335.0, 4346.0)], blue=(4283.5, 4319.75), red=(4367.25, 4419.75),
                        tracks="core depth", source="Gray & Corbally (2009) ch. 5 (from memory)"),
    "hgamma_wings": dict(feature=[(4316.0, 4330.0), (4351.0, 4365.0)], blue=(4283.5, 4300.0),
                         red=(4400.0, 4419.75),
                         tracks="wing depth 10-25 A from the core: broad in dwarfs (pressure broadening)",
                         source="Gray & Corbally (2009) ch. 5 (from memory)"),
    "hbeta": dict(feature=[(4847.875, 4876.625)], blue=(4827.875, 4847.875), red=(4876.625, 4891.625),
                  tracks="Balmer strength", source="Lick Hbeta bands, Worthey et al. (1994) (from memory)"),
    "hbeta_wings": dict(feature=[(4830.0, 4848.0), (4875.0, 4893.0)], blue=(4795.0, 4810.0),
                        red=(4905.0, 4913.0),
                        tracks="wing depth: broad in dwarfs", source="Gray & Corbally (2009) ch. 5 (from memory)"),
    "hdelta_wide": dict(feature=[(4061.0, 4141.0)], blue=(4030.0, 4040.0), red=(4162.0, 4172.0),
                        tracks="Hdelta over +-40 A: the pressure-broadened wings of B-A dwarfs",
                        source="Gray & Corbally (2009) ch. 4-5, Balmer-line widths as luminosity criterion (from memory)"),
    "hdelta_outer": dict(feature=[(4066.0, 4086.0), (4117.0, 4137.0)], blue=(4030.0, 4040.0), red=(4162.0, 4172.0),
                         tracks="Hdelta outer wings 15-35 A from the core", source="as hdelta_wide (from memory)"),
    "hgamma_wide": dict(feature=[(4300.0, 4381.0)], blue=(4265.0, 4280.0), red=(4400.0, 4420.0),
                        tracks="Hgamma over +-40 A", source="as hdelta_wide (from memory)"),
    "hgamma_outer": dict(feature=[(4305.0, 4325.0), (4356.0, 4376.0)], blue=(4265.0, 4280.0), red=(4400.0, 4420.0),
                         tracks="Hgamma outer wings", source="as hdelta_wide (from memory)"),
    "hbeta_wide": dict(feature=[(4821.0, 4901.0)], blue=(4780.0, 4800.0), red=(4935.0, 4950.0),
                       tracks="Hbeta over +-40 A", source="as hdelta_wide (from memory)"),
    "halpha": dict(feature=[(6554.0, 6572.0)], blue=(6500.0, 6530.0), red=(6590.0, 6610.0),
                   tracks="Balmer strength; negative when in emission", source="common practice"),
    # --- Metals and the Ca II/H balance ----------------------------------------------
    "caii_k": dict(feature=[(3927.0, 3940.0)], blue=(3908.0, 3919.0), red=(3943.0, 3955.0),
                   tracks="rises from late B to K", source="Gray & Corbally (2009) ch. 5-6, Ca II K (from memory)"),
    "caii_h_heps": dict(feature=[(3962.0, 3977.0)], blue=(3943.0, 3955.0), red=(3990.0, 4010.0),
                        tracks="Ca II H + Hepsilon blend", source="Gray & Corbally (2009) ch. 5 (from memory)"),
    "fei_4045": dict(feature=[(4041.0, 4050.0)], blue=(4030.0, 4037.0), red=(4052.0, 4058.0),
                     tracks="metals, F-K", source="Gray & Corbally (2009) ch. 6-7, Fe I 4045 (from memory)"),
    "srii_4077": dict(feature=[(4073.0, 4081.0)], blue=(4052.0, 4058.0), red=(4084.0, 4090.0),
                      tracks="Sr II 4077 (+Fe I 4071 blend): strong in F-K giants/supergiants",
                      source="Gray & Corbally (2009) ch. 6-7, Sr II 4077 / Fe I 4045 (from memory)"),
    "cn_4216": dict(feature=[(4142.125, 4177.125)], blue=(4080.125, 4117.625), red=(4244.125, 4284.125),
                    tracks="CN 4216 band: strong in G-K giants", source="Lick CN bands, Worthey et al. (1994) (from memory)"),
    "srii_4216": dict(feature=[(4212.0, 4219.5)], blue=(4196.0, 4206.0), red=(4238.0, 4246.0),
                      tracks="Sr II 4216 + CN break: luminosity in G-K", source="Gray & Corbally (2009) ch. 7 (from memory)"),
    "cai_4227": dict(feature=[(4222.25, 4234.75)], blue=(4211.0, 4219.75), red=(4241.0, 4251.0),
                     tracks="rises G to M; stronger in late K-M dwarfs",
                     source="Lick Ca4227 bands, Worthey et al. (1994); Gray & Corbally (2009) ch. 7 (from memory)"),
    "fe_ii_4173": dict(feature=[(4170.0, 4180.0)], blue=(4160.0, 4167.0), red=(4183.0, 4190.0),
                       tracks="Fe II/Ti II 4172-4178: luminosity in A-F", source="Gray & Corbally (2009) ch. 6 (from memory)"),
    "fei_4144": dict(feature=[(4140.0, 4148.0)], blue=(4130.0, 4137.0), red=(4160.0, 4167.0),
                     tracks="Fe I 4144: reference for Fe II/Ti II 4172-4178", source="Gray & Corbally (2009) ch. 6 (from memory)"),
    "cri_4254": dict(feature=[(4250.0, 4258.0)], blue=(4241.0, 4248.0), red=(4262.0, 4268.0),
                     tracks="Cr I 4254: G-K", source="Gray & Corbally (2009) ch. 7 (from memory)"),
    "g_band": dict(feature=[(4281.375, 4316.375)], blue=(4266.375, 4282.625), red=(4318.875, 4335.125),
                   tracks="CH G band: appears at F, maximum at K", source="Lick G4300 bands, Worthey et al. (1994) (from memory)"),
    "fe_4383": dict(feature=[(4369.125, 4420.375)], blue=(4359.125, 4370.375), red=(4442.875, 4455.375),
                    tracks="Fe I 4383 and neighbours", source="Lick Fe4383 bands, Worthey et al. (1994) (from memory)"),
    "mg2": dict(feature=[(5154.125, 5196.625)], blue=(4895.125, 4957.625), red=(5301.125, 5366.125),
                tracks="Mg b + MgH: rises to M; MgH strong in K-M dwarfs",
                source="Lick Mg2 bands, Worthey et al. (1994) (from memory)"),
    "mg_b": dict(feature=[(5160.125, 5192.625)], blue=(5142.625, 5161.375), red=(5191.375, 5206.375),
                 tracks="Mg b triplet", source="Lick Mgb bands, Worthey et al. (1994) (from memory)"),
    "fe_5270": dict(feature=[(5245.65, 5285.65)], blue=(5233.15, 5248.15), red=(5285.65, 5318.15),
                    tracks="Fe I 5270", source="Lick Fe5270 bands, Worthey et al. (1994) (from memory)"),
    "fe_5335": dict(feature=[(5312.125, 5352.125)], blue=(5304.625, 5315.875), red=(5353.375, 5363.375),
                    tracks="Fe I 5335", source="Lick Fe5335 bands, Worthey et al. (1994) (from memory)"),
    # --- Molecules: TiO in K-M (three-band, so no slope enters) -------------------------
    "tio_4955": dict(feature=[(4955.0, 4980.0)], blue=(4935.0, 4950.0), red=(5040.0, 5060.0),
                     tracks="TiO 4955 head: M types", source="Gray & Corbally (2009) ch. 8, TiO band heads (from memory)"),
    "tio_5448": dict(feature=[(5448.0, 5480.0)], blue=(5420.0, 5440.0), red=(5560.0, 5590.0),
                     tracks="TiO 5448 head", source="Gray & Corbally (2009) ch. 8 (from memory)"),
    "tio_1": dict(feature=[(5936.625, 5994.125)], blue=(5816.625, 5849.125), red=(6038.625, 6103.625),
                  tracks="TiO", source="Lick TiO1 bands, Worthey et al. (1994) (from memory)"),
    "tio_2": dict(feature=[(6189.625, 6272.125)], blue=(6066.625, 6141.625), red=(6372.625, 6415.125),
                  tracks="TiO 6159 system", source="Lick TiO2 bands, Worthey et al. (1994) (from memory)"),
    "tio_6651": dict(feature=[(6655.0, 6690.0)], blue=(6625.0, 6645.0), red=(6720.0, 6740.0),
                     tracks="TiO 6651 head", source="Gray & Corbally (2009) ch. 8 (from memory)"),
    "tio_7054": dict(feature=[(7058.0, 7090.0)], blue=(7030.0, 7050.0), red=(7130.0, 7150.0),
                     tracks="TiO 7054 head: M subtypes", source="Gray & Corbally (2009) ch. 8 (from memory)"),
}

#: name -> (numerator feature, denominator feature, source): ln((1 - d_a) / (1 - d_b))
RATIOS = {
    "heii4541_hei4471": ("heii_4541", "hei_4471", "Gray & Corbally (2009) ch. 3, O-star types (from memory)"),
    "hei4471_mgii4481": ("hei_4471", "mgii_4481", "Gray & Corbally (2009) ch. 4, B types (from memory)"),
    "caiik_hheps": ("caii_k", "caii_h_heps", "Gray & Corbally (2009) ch. 5, Ca II K vs H+Heps in A-F (from memory)"),
    "caiik_hdelta": ("caii_k", "hdelta_core", "Gray & Corbally (2009) ch. 5, Ca II K vs Hdelta (from memory)"),
    "gband_hgamma": ("g_band", "hgamma_core", "Gray & Corbally (2009) ch. 6, G band vs Hgamma in F-G (from memory)"),
    "srii4077_fei4045": ("srii_4077", "fei_4045", "Gray & Corbally (2009) ch. 6-7, luminosity F-K (from memory)"),
    "srii4216_cai4227": ("srii_4216", "cai_4227", "Gray & Corbally (2009) ch. 7, luminosity G-K (from memory)"),
    "cai4227_fe4383": ("cai_4227", "fe_4383", "Ca I 4227 vs Fe I 4383: dwarfs vs giants in K-M (from memory)"),
    "hgamma_wings_core": ("hgamma_wings", "hgamma_core",
                          "Balmer wing/core: pressure-broadened wings of dwarfs, Gray & Corbally (2009) ch. 4-5 (from memory)"),
    "hbeta_wings_core": ("hbeta_wings", "hbeta", "Balmer wing/core (from memory), as above"),
    "hdelta_full_core": ("hdelta", "hdelta_core", "Balmer width: full band against core (from memory)"),
    "hdelta_outer_core": ("hdelta_outer", "hdelta_core", "Balmer outer wing/core (from memory), as above"),
    "hgamma_outer_core": ("hgamma_outer", "hgamma_core", "Balmer outer wing/core (from memory), as above"),
    "feii4173_fei4144": ("fe_ii_4173", "fei_4144", "Fe II/Ti II 4172-8 vs Fe I 4144: luminosity in A-G, Gray & Corbally (2009) ch. 6 (from memory)"),
    "cn_gband": ("cn_4216", "g_band", "CN 4216 vs G band: CN strong in G-K giants, Gray & Corbally (2009) ch. 7 (from memory)"),
    "mg2_fe5270": ("mg2", "fe_5270", "MgH + Mg b vs Fe: MgH strong in K-M dwarfs, Gray & Corbally (2009) ch. 7-8 (from memory)"),
}


def criteria_names() -> list[str]:
    """Names of all criteria, in the order of :func:`measure_criteria`'s output."""
    return list(CRITERIA) + list(RATIOS)


def _band_table():
    """Flatten CRITERIA into arrays of band limits (built once)."""
    bands, index = [], {}

    def add(b):
        b = (float(b[0]), float(b[1]))
        if b not in index:
            index[b] = len(bands)
            bands.append(b)
        return index[b]

    feat, blue, red = [], [], []
    for spec in CRITERIA.values():
        feat.append([add(b) for b in spec["feature"]])
        blue.append(add(spec["blue"]))
        red.append(add(spec["red"]))
    return np.array(bands), feat, np.array(blue), np.array(red)


_BANDS, _FEAT, _BLUE, _RED = _band_table()
_BAND_MID = _BANDS.mean(axis=1)
_RATIO_IDX = np.array([[list(CRITERIA).index(a), list(CRITERIA).index(b)] for a, b, _ in RATIOS.values()])


def _band_means(wave, flux, good, bands):
    """Mean flux in each band [lo, hi] (Angstrom) and the fraction of good pixels in it.

    The integral uses the cumulative trapezoid of the flux interpolated over bad
    pixels, so any band costs two interpolations (fast for many bands and trial
    velocities). A band that falls outside the spectrum gets NaN.
    """
    f = np.where(good, flux, np.interp(wave, wave[good], flux[good]))
    cum = cumulative_trapezoid(f, wave, initial=0.0)
    lo, hi = bands[..., 0], bands[..., 1]
    mean = (np.interp(hi, wave, cum) - np.interp(lo, wave, cum)) / (hi - lo)
    cgood = cumulative_trapezoid(good.astype(float), wave, initial=0.0)
    frac = (np.interp(hi, wave, cgood) - np.interp(lo, wave, cgood)) / (hi - lo)
    outside = (lo < wave[0]) | (hi > wave[-1])
    mean = np.where(outside, np.nan, mean)
    frac = np.where(outside, 0.0, frac)
    return mean, frac


def _static_noise_factors():
    """Per depth criterion, sum of 1/width (1/A) weighting the noise of its three bands.

    For a depth ``1 - F/(F_b (1 - t) + F_r t)`` with independent pixel noise
    ``sigma`` per pixel of width ``dx`` at unit flux, the variance is about
    ``sigma**2 dx (1/W_f + (1 - t)**2/W_b + t**2/W_r)`` (W the band widths,
    ``t`` where the feature sits between the side bands): error propagation.
    """
    out = np.empty(len(CRITERIA))
    for i, feat in enumerate(_FEAT):
        wf = np.sum(_BANDS[feat, 1] - _BANDS[feat, 0])
        wb = _BANDS[_BLUE[i], 1] - _BANDS[_BLUE[i], 0]
        wr = _BANDS[_RED[i], 1] - _BANDS[_RED[i], 0]
        t = (np.mean(_BAND_MID[feat]) - _BAND_MID[_BLUE[i]]) / (_BAND_MID[_RED[i]] - _BAND_MID[_BLUE[i]])
        out[i] = 1.0 / wf + (1.0 - t) ** 2 / wb + t ** 2 / wr
    return out


_NOISE_FACTORS = _static_noise_factors()


def measure_criteria(wave, flux, mask=None, snr=None, pixel=None, min_good=0.5):
    """Measure all criteria on one spectrum given as plain arrays.

    Parameters
    ----------
    wave : ndarray
        Wavelengths in air, Angstrom, increasing, already in the rest frame.
    flux : ndarray
        Flux (any scale, normalised or not: only local ratios are used).
    mask : ndarray of bool, optional
        True for bad pixels.
    snr : float, optional
        Signal-to-noise ratio per original pixel, for the noise of each criterion.
    pixel : float, optional
        Width in Angstrom of the original pixels (default: median step of ``wave``).
    min_good : float
        Minimum fraction of good pixels in every band a criterion uses; else NaN.

    Returns
    -------
    values, noise : ndarray
        One value per name of :func:`criteria_names` (NaN where not measurable),
        and its expected 1-sigma noise from ``snr`` (zeros when ``snr`` is None).
    """
    n_all = len(CRITERIA) + len(RATIOS)
    wave = np.asarray(wave, float)
    flux = np.asarray(flux, float)
    good = np.isfinite(flux) & np.isfinite(wave)
    if mask is not None:
        good &= ~np.asarray(mask, bool)
    if good.sum() < 10:
        return np.full(n_all, np.nan), np.zeros(n_all)
    mean, frac = _band_means(wave, flux, good, _BANDS)
    mean = np.where(frac >= min_good, mean, np.nan)
    fb, fr = mean[_BLUE], mean[_RED]
    xb, xr = _BAND_MID[_BLUE], _BAND_MID[_RED]
    depth = np.empty(len(CRITERIA))
    for i, feat in enumerate(_FEAT):
        # pseudo-continuum at each feature band's centre, then the band-width-weighted mean
        xm = _BAND_MID[feat]
        cont = fb[i] + (fr[i] - fb[i]) * (xm - xb[i]) / (xr[i] - xb[i])
        widths = _BANDS[feat, 1] - _BANDS[feat, 0]
        if np.all(cont > 0):
            depth[i] = 1.0 - np.sum(widths * mean[feat] / cont) / widths.sum()
        else:   # no positive flux beside the feature (a zero or sky-subtracted spectrum): undefined
            depth[i] = np.nan
    resid = np.clip(1.0 - depth, 1e-3, None)
    ratios = np.log(resid[_RATIO_IDX[:, 0]] / resid[_RATIO_IDX[:, 1]])
    values = np.concatenate([depth, ratios])
    noise = np.zeros(n_all)
    if snr is not None and np.isfinite(snr) and snr > 0:
        dx = float(pixel) if pixel else float(np.median(np.diff(wave)))
        sd = np.sqrt(_NOISE_FACTORS * dx) / snr
        sr = np.hypot(sd[_RATIO_IDX[:, 0]] / resid[_RATIO_IDX[:, 0]], sd[_RATIO_IDX[:, 1]] / resid[_RATIO_IDX[:, 1]])
        noise = np.concatenate([sd, sr])
    return values, noise


# ---------------------------------------------------------------------------
# From a Spectrum to criteria: rest frame, calibration resolution, S/N
# ---------------------------------------------------------------------------

def _snr_of(spectrum, info):
    """S/N per pixel: the carried value, else DER_SNR (Stoehr et al. 2008) via specutils."""
    if info.snr is not None and np.isfinite(info.snr) and info.snr > 0:
        return float(info.snr)
    import warnings

    from specutils.analysis import snr_derived

    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)   # 0/0 on a flat or empty spectrum
            value = float(snr_derived(spectrum))
    except Exception:  # noqa: BLE001 - a failed S/N estimate only drops the noise term
        return None
    return value if np.isfinite(value) and value > 0 else None


def spectrum_criteria(spectrum, resolution=4.5 * u.AA, rv=None, measure_velocity=True,
                      assume_resolution=None, resolving_power=None):
    """Measure the classification criteria of a spectrum in its rest frame at a given resolution.

    Parameters
    ----------
    spectrum : specutils.Spectrum
        Observed spectrum, normalised or not (only local ratios are used), in air or vacuum.
    resolution : astropy.units.Quantity
        FWHM (Angstrom) the criteria are measured at (the calibration's).
    rv : astropy.units.Quantity, optional
        Velocity to remove. If None and ``measure_velocity``, it is measured with
        :func:`specan.velocity.measure` (topocentric velocity, i.e. the shift seen in the data).
    measure_velocity : bool
        Measure the velocity when ``rv`` is not given.
    assume_resolution : astropy.units.Quantity, optional
        FWHM of the spectrum when its metadata do not give a resolving power.
        Default: the pixel size decides, see Notes.
    resolving_power : float, optional
        Resolving power already estimated from the narrowest lines (the velocity stage
        reports it), used when the metadata give none: saves estimating it again.

    Returns
    -------
    dict
        ``values`` and ``noise`` (ndarrays in :func:`criteria_names` order),
        ``snr``, ``rv`` (Quantity or None), ``notes`` (list of str).

    Notes
    -----
    Without a resolving power in the metadata, it is estimated from the widths of
    the narrowest lines (:mod:`specan.lines`). Where that fails, a spectrum sampled
    at a quarter of the calibration's FWHM or coarser is taken to be at the
    calibration's resolution (low-resolution data like the standards), and a
    finer-sampled one is taken to be sampled at 2.5 pixels per FWHM. Each of these
    says so in ``notes``; give the resolving power to the reader to avoid them.
    """
    notes = []
    info = get_info(spectrum)
    fwhm_out = float(u.Quantity(resolution, u.AA).value)
    wave = wavelength_in(spectrum, "air")
    flux = np.asarray(spectrum.flux.value, float)
    good = np.isfinite(flux) & np.isfinite(wave)
    if spectrum.mask is not None:
        good &= ~np.asarray(spectrum.mask, bool)
    if wave[0] > wave[-1]:
        wave, flux, good = wave[::-1], flux[::-1], good[::-1]
    if good.sum() < 20:
        raise AnalysisError("fewer than 20 usable pixels: cannot classify", info.path)
    snr = _snr_of(spectrum, info)

    # Rest frame: criteria bands are 10-40 A wide, so a shift of 1000 km/s (13 A at 4000 A)
    # would move features out of their bands.
    lines_asked = False   # whether the narrowest lines were already asked for R (and how they answered)
    if rv is None and measure_velocity:
        try:
            from . import velocity

            vres = velocity.measure(spectrum, errors="td", barycentric=False)
            # without R in the metadata the velocity stage has asked the narrowest lines already
            lines_asked = not info.resolving_power
            if resolving_power is None and vres.get("resolving_power_source") == "narrowest lines":
                resolving_power = vres["resolving_power"]
            rv = vres.get("rv_topo")
            if rv is None:
                rv = vres.get("rv")
        except ImportError:
            notes.append("velocity stage not available: criteria measured in the observed frame")
        except Exception as exc:  # noqa: BLE001 - classification can go on in the observed frame
            notes.append(f"velocity not measured ({exc}): criteria measured in the observed frame")
    if rv is not None:
        v = float(u.Quantity(rv, u.km / u.s).value)
        if np.isfinite(v):
            # the air/vacuum distinction of the factor is below 3e-4 of the shift, negligible here
            wave = wave / doppler_factor(v * u.km / u.s)
        else:
            rv = None

    # Only the wavelengths the criteria use (and a margin for the smoothing): the pixel size and
    # the smoothing grid come from medians, which a spectrum reaching far outside (a model from
    # the ultraviolet to the infrared, measured) would set from pixels nowhere near the bands.
    margin = 10.0 * fwhm_out
    near = (wave >= _BANDS.min() - margin) & (wave <= _BANDS.max() + margin)
    if (good & near).sum() >= 20 and not near.all():
        first, last = np.flatnonzero(near)[[0, -1]]
        wave, flux, good = wave[first:last + 1], flux[first:last + 1], good[first:last + 1]
    # Resolution of the input
    pixel = float(np.median(np.diff(wave)))
    if info.resolving_power:
        fwhm_in = wave / float(info.resolving_power)
    elif assume_resolution is not None:
        fwhm_in = float(u.Quantity(assume_resolution, u.AA).value)
    elif (r_est := resolving_power or (None if lines_asked else estimate_resolving_power(spectrum))) is not None:
        fwhm_in = wave / r_est
        notes.append(f"resolving power unknown: R ~ {r_est:.0f} estimated from the narrowest lines "
                     "(give the resolving power to the reader to avoid the estimate)")
    elif pixel >= fwhm_out / 4.0:
        fwhm_in = fwhm_out
        notes.append(f"resolving power unknown: assumed already at the calibration's {fwhm_out:g} A FWHM")
    else:
        fwhm_in = 2.5 * pixel
        notes.append(f"resolving power unknown: assumed 2.5 pixels per resolution element ({2.5 * pixel:.2g} A)")
    grid, fs, gs = smooth_to_fwhm(wave, flux, good, fwhm_in, fwhm_out)
    values, noise = measure_criteria(grid, fs, ~gs, snr=snr, pixel=pixel)
    return {"values": values, "noise": noise, "snr": snr,
            "rv": None if rv is None else u.Quantity(rv, u.km / u.s), "notes": notes}


# ---------------------------------------------------------------------------
# Calibration model on criteria arrays (no spectra here)
# ---------------------------------------------------------------------------

def _lum_basis(lum):
    """Piecewise-linear basis in luminosity class with a knot at III.

    Column 0 runs V=0, IV=0.5, III=II=I=1 (dwarf to giant), column 1 runs
    III..V=0, II=0.5, I=1 (giant to supergiant), so giants and supergiants can
    differ from dwarfs by different amounts, and the sparsely represented
    classes II and IV sit halfway between their neighbours.
    """
    lum = np.asarray(lum, float)
    return np.stack([np.clip((5.0 - lum) / 2.0, 0.0, 1.0), np.clip((3.0 - lum) / 2.0, 0.0, 1.0)], axis=-1)


def _fit_relations(X, code, lum, grid, bandwidth, neighbours, ridge, scatter_floor):
    """Kernel-weighted local regression of every criterion on (code, class).

    At each grid code ``g`` the standards get Gaussian weights in code of width
    ``max(bandwidth, distance to the neighbours-th nearest standard)`` (adaptive,
    so sparse parts of a library are not fitted from one star; NaN criteria get
    zero weight), and each criterion is fitted as
    ``a + b (code - g) + c . lum_basis`` by weighted least squares with a ridge
    (relative to the summed weight) on ``b`` and ``c``, so class terms that the
    local standards cannot constrain shrink to zero. Returns the mean ``a``
    (G, J), class offsets ``c`` (G, J, 2), the residual scatter (G, J) and the
    effective number of standards behind each value (G, J).
    """
    n, nj = X.shape
    dist = np.abs(code[None, :] - grid[:, None])                      # (G, n)
    k = min(neighbours, n) - 1
    h = np.maximum(bandwidth, np.partition(dist, k, axis=1)[:, k])    # (G,)
    w = np.exp(-0.5 * (dist / h[:, None]) ** 2)
    ok = np.isfinite(X)
    Xz = np.where(ok, X, 0.0)
    lb = _lum_basis(lum)
    A = np.concatenate([np.ones_like(dist)[..., None], (code[None, :] - grid[:, None])[..., None],
                        np.broadcast_to(lb[None], dist.shape + (2,))], axis=-1)  # (G, n, 4)
    W = w[:, :, None] * ok[None, :, :]                                 # (G, n, J)
    AtWA = np.einsum("gnp,gnj,gnq->gjpq", A, W, A)
    pen = np.diag([0.0, ridge[0], ridge[1], ridge[1]])
    sumw = W.sum(axis=1)
    AtWA = AtWA + pen[None, None] * np.maximum(sumw, 1e-9)[:, :, None, None]
    AtWx = np.einsum("gnp,gnj,nj->gjp", A, W, Xz)
    beta = np.linalg.solve(AtWA, AtWx[..., None])[..., 0]              # (G, J, 4)
    resid = Xz[None] - np.einsum("gnp,gjp->gnj", A, beta)
    neff = sumw ** 2 / np.maximum((W ** 2).sum(axis=1), 1e-12)
    var = (resid ** 2 * W).sum(axis=1) / np.maximum(sumw, 1e-12) * neff / np.maximum(neff - 4.0, 1.0)
    scatter = np.sqrt(var + scatter_floor ** 2)
    return beta[..., 0], beta[..., 2:], scatter, neff


_LUMS = np.arange(1.0, 6.0)   # luminosity classes I..V as numbers


def _class_means(mean, offsets, ok):
    """Model value of the criteria ``ok`` at every (grid code, class): (G, 5, J)."""
    return mean[:, None, ok] + np.einsum("gjk,lk->glj", offsets[:, ok], _lum_basis(_LUMS))


def _loglike(x, noise, mean, offsets, scatter, weights, dof, ok=None, scale_sigma=0.0):
    """Weighted Student-t log-likelihood of criteria ``x`` on the (grid code, class) lattice.

    A Student-t (``dof`` degrees of freedom) rather than a Gaussian, so one
    criterion hit by a defect, an emission line or a peculiarity costs a bounded
    penalty instead of deciding the type. ``weights`` down-weight criteria that
    repeat the information of others (see :meth:`Calibration.fit_criteria`).
    The measurement noise adds in quadrature to the standards' scatter.

    With ``scale_sigma > 0`` the model's criteria are multiplied by a free
    line-strength scale ``k`` per half of the spectrum (blue of, red of and
    across :data:`SPLIT_WAVELENGTH`), with a Gaussian prior ``k ~ 1 +- scale_sigma``:
    spectrographs differ in scattered light and line spread wings, which dilute
    or deepen all features of a region together; only the *pattern* of the
    criteria (their ratios, as the MK criteria are defined) then decides the
    type. ``k`` is the weighted least-squares value at each lattice point.
    """
    if ok is None:
        ok = np.isfinite(x)
    m = _class_means(mean, offsets, ok)
    s = np.sqrt(scatter[:, None, ok] ** 2 + noise[ok] ** 2)
    xo = x[ok]
    penalty = 0.0
    if scale_sigma > 0:
        a = weights[ok] / s ** 2
        side = _SIDE[ok]
        prior = 1.0 / scale_sigma ** 2
        for sd in (-1, 0, 1):
            sel = side == sd
            if not sel.any():
                continue
            num = np.sum(a[..., sel] * xo[sel] * m[..., sel], axis=-1) + prior
            den = np.sum(a[..., sel] * m[..., sel] ** 2, axis=-1) + prior
            k = np.clip(num / den, 0.25, 4.0)
            m[..., sel] *= k[..., None]
            penalty = penalty + 0.5 * (k - 1.0) ** 2 * prior
    z2 = ((xo - m) / s) ** 2
    term = 0.5 * (dof + 1.0) * np.log1p(z2 / dof) + np.log(s)
    return -np.sum(weights[ok] * term, axis=-1) - penalty, z2


def _round(a, digits=5):
    """Round to ``digits`` significant digits for a compact, readable file."""
    a = np.asarray(a, float)
    with np.errstate(divide="ignore", invalid="ignore"):
        mag = np.where(np.isfinite(a) & (a != 0), np.floor(np.log10(np.abs(a))), 0)
    scale = 10.0 ** (digits - 1 - mag)
    out = np.round(a * scale) / scale
    return [None if not np.isfinite(v) else float(v) for v in out.ravel()] if out.ndim <= 1 else \
        [_round(row, digits) for row in out]


def _definitions():
    """The criteria definitions as stored in a calibration file (to check compatibility)."""
    out = []
    for name, spec in CRITERIA.items():
        out.append({"name": name, "kind": "depth", "feature": [list(b) for b in spec["feature"]],
                    "blue": list(spec["blue"]), "red": list(spec["red"]), "source": spec["source"]})
    for name, (a, b, src) in RATIOS.items():
        out.append({"name": name, "kind": "log_ratio", "numerator": a, "denominator": b, "source": src})
    return out


#: S/N per pixel below which the ``low_snr`` flag is raised (common practice: criteria at
#: R ~ 1000-2000 become unreliable well before S/N 20; same threshold as specan.pipeline).
LOW_SNR = 20.0
#: A spectrum whose criteria sum to less than this fraction of the weakest standard's absolute
#: depth has no absorption features to classify by (our choice: the JHC standards' weakest, an
#: O5 star, sums to 1.08; noise at S/N 100 adds about 0.2).
FEATURELESS = 0.3
#: A line rising this far above its pseudo-continuum (plus 3 sigma of noise) is emission
#: (our convention, not a published threshold).
EMISSION_DEPTH = -0.05
#: Criteria whose features lie entirely blueward / redward of this (A) form the two halves
#: compared for the ``composite`` flag (a hot star dominates the blue, a cool one the red);
#: our choice, splitting the criteria list roughly in half.
SPLIT_WAVELENGTH = 4600.0
_TAUS = (1.0, 1.5, 2.0, 3.0, 4.0, 6.0, 8.0, 12.0, 16.0)
_FINE_STEP = 0.25


def _criterion_side():
    """-1 for criteria entirely blue of SPLIT_WAVELENGTH, +1 entirely red, 0 straddling."""
    side = {}
    for name, spec in CRITERIA.items():
        lo = min(spec["blue"][0], *(b[0] for b in spec["feature"]))
        hi = max(spec["red"][1], *(b[1] for b in spec["feature"]))
        side[name] = -1 if hi < SPLIT_WAVELENGTH else (1 if lo > SPLIT_WAVELENGTH else 0)
    for name, (a, b, _) in RATIOS.items():
        side[name] = side[a] if side[a] == side[b] else 0
    return np.array([side[n] for n in criteria_names()])


_SIDE = _criterion_side()

#: Air wavelengths (A) of the lines a star's own emission fills in: H-alpha to H-epsilon and
#: Ca II K and H (NIST ASD, from memory).
_EMISSION_LINES = (6562.8, 4861.3, 4340.5, 4101.7, 3970.1, 3933.7, 3968.5)


def _emission_sensitive():
    """Criteria whose feature band holds one of :data:`_EMISSION_LINES` (ratios: either part)."""
    hit = {name: any(lo <= w <= hi for lo, hi in spec["feature"] for w in _EMISSION_LINES)
           for name, spec in CRITERIA.items()}
    for name, (a, b, _) in RATIOS.items():
        hit[name] = hit[a] or hit[b]
    return np.array([hit[n] for n in criteria_names()])


_EMISSION_SENSITIVE = _emission_sensitive()


def _fit_two_scale(X, code, lum, grid, settings):
    """Class offsets from a wide window in type, then the mean relation from a narrow one.

    The luminosity-class terms of a criterion change slowly with type, but a window
    of a few standards (enough for the mean relation) holds one or two giants at
    most, so fitted there they are mostly noise. They are therefore fitted with the
    wider ``class_bandwidth`` / ``class_neighbours`` window; each standard is then
    moved to class V with those offsets and the mean relation and scatter are fitted
    in the narrow window, class terms fixed (an infinite ridge).
    With ``class_bandwidth`` 0 (and in calibrations saved before it existed) the one-window fit.
    """
    cb = settings.get("class_bandwidth")
    if not cb:
        return _fit_relations(X, code, lum, grid, settings["bandwidth"], settings["neighbours"],
                              settings["ridge"], settings["scatter_floor"])
    _, offsets, _, _ = _fit_relations(X, code, lum, grid, cb, settings["class_neighbours"],
                                      (settings["ridge"][0], settings["class_ridge"]), settings["scatter_floor"])
    at_code = np.stack([np.stack([np.interp(code, grid, offsets[:, j, k]) for k in range(2)], axis=-1)
                        for j in range(X.shape[1])], axis=1)                   # (n, J, 2)
    lb = _lum_basis(lum)
    dwarf = X - np.einsum("njk,nk->nj", at_code, lb)
    mean, _, scatter, neff = _fit_relations(dwarf, code, lum, grid, settings["bandwidth"], settings["neighbours"],
                                            (settings["ridge"][0], 1e9), settings["scatter_floor"])
    return mean, offsets, scatter, neff


def _fit_model(X, code, lum, settings, grid):
    """Relations, scatter and redundancy weights from a criteria matrix (one fit)."""
    mean, offsets, scatter, neff = _fit_two_scale(X, code, lum, grid, settings)
    # Standardised residuals of the standards about the model at their own type and class
    gi = np.clip(np.round((code - grid[0]) / (grid[1] - grid[0])).astype(int), 0, len(grid) - 1)
    model = mean[gi] + np.einsum("njk,nk->nj", offsets[gi], _lum_basis(lum))
    z = (X - model) / scatter[gi]
    z = np.where(np.isfinite(z), z, 0.0)
    # A criterion correlated with many others (e.g. four measures of one Balmer line) would
    # otherwise count several times: weight 1 / (sum of squared correlations)^power.
    with np.errstate(invalid="ignore", divide="ignore"):
        R = np.corrcoef(z.T)
    R = np.where(np.isfinite(R), R, 0.0)
    np.fill_diagonal(R, 1.0)
    weights = 1.0 / np.sum(R ** 2, axis=1) ** settings["redundancy_power"]
    return {"grid": grid, "mean": mean, "offsets": offsets, "scatter": scatter, "neff": neff,
            "weights": weights}


def _fine(model, scale_sigma=0.0):
    """The model interpolated onto a finer grid of codes (classification lattice)."""
    g = model["grid"]
    fg = np.arange(g[0], g[-1] + 1e-9, _FINE_STEP)
    def interp(a):
        flat = a.reshape(len(g), -1)
        out = np.empty((len(fg), flat.shape[1]))
        for j in range(flat.shape[1]):
            out[:, j] = np.interp(fg, g, flat[:, j])
        return out.reshape((len(fg),) + a.shape[1:])
    return {"grid": fg, "mean": interp(model["mean"]), "offsets": interp(model["offsets"]),
            "scatter": interp(model["scatter"]), "weights": model["weights"], "scale_sigma": scale_sigma}


def _posterior(x, noise, fine, dof, tau, ok=None):
    """Posterior over (code, class), its marginals and the lattice log-likelihood."""
    ll, z2 = _loglike(x, noise, fine["mean"], fine["offsets"], fine["scatter"], fine["weights"], dof, ok,
                      fine.get("scale_sigma", 0.0))
    p = np.exp((ll - ll.max()) / tau)
    p /= p.sum()
    return p, ll, z2


def _summarise(p, grid):
    """Most probable code, half the 16-84% interval, class probabilities.

    The mode of the marginal code posterior, not its median: when the criteria
    allow two types (an A supergiant and an F dwarf share Balmer strengths),
    the median lands between them, on a type neither supports (in
    cross-validation on the reference library the mode was right within two
    subclasses 4-8% more often).
    """
    pc = p.sum(axis=1)
    cdf = np.cumsum(pc) - 0.5 * pc
    q16, q84 = np.interp([0.16, 0.84], cdf, grid)
    return float(grid[np.argmax(pc)]), float(0.5 * (q84 - q16)), p.sum(axis=0)


def _quality(z2, weights, ok, gi, li):
    """Weighted mean squared standardised residual at one lattice point (1 ~ a typical standard)."""
    w = weights[ok]
    return float(np.sum(w * z2[gi, li]) / np.sum(w))


class Calibration:
    """Relations between classification criteria and MK type, learnt from standards.

    Parameters
    ----------
    resolution : astropy.units.Quantity
        FWHM (Angstrom) of the standards; every spectrum is degraded to it before
        its criteria are measured.
    source : str
        Where the standards come from (written to the file).
    bandwidth : float
        Smallest width (subclasses) of the Gaussian window in type code.
    neighbours : int
        The window widens until it holds this many standards (sparse parts of a library).
    ridge : (float, float)
        Ridge on the local slope in code and on the luminosity-class terms.
    class_bandwidth, class_neighbours, class_ridge : float, int, float
        The wider window (and its ridge) in which the luminosity-class terms are
        fitted (see :func:`_fit_two_scale`); ``class_bandwidth=0`` fits them in the
        narrow window with ``ridge[1]``.
    scatter_floor : float
        Added in quadrature to every learnt scatter (no criterion is trusted to better than this).
    dof : float
        Degrees of freedom of the Student-t likelihood (robust to single bad criteria).
    redundancy_power : float
        Exponent of the down-weighting of correlated criteria (0: none, 1: full).
    depth_scale_sigma : float
        Prior width of the free line-strength scale per half of the spectrum
        (instrumental dilution; see :func:`_loglike`); 0 disables it.
    grid_step : float
        Step (subclasses) of the stored relations.
    cv_folds : int
        Internal cross-validation folds used to calibrate the likelihood temperature,
        the fit-quality and composite thresholds.
    measure_velocity : bool
        Measure and remove each standard's velocity before measuring its criteria.

    Notes
    -----
    Use like an estimator: ``Calibration(...).fit(spectra, labels)``, then
    ``.classify(spectrum)``, ``.save(path)`` and ``Calibration.load(path)``.
    """

    def __init__(self, resolution=4.5 * u.AA, source="", bandwidth=1.5, neighbours=6, ridge=(0.1, 0.5),
                 class_bandwidth=4.0, class_neighbours=16, class_ridge=0.1, scatter_floor=0.003, dof=4.0,
                 redundancy_power=0.5, depth_scale_sigma=0.3, grid_step=1.0, cv_folds=5, measure_velocity=True):
        self.resolution = u.Quantity(resolution, u.AA)
        self.source = str(source)
        self.settings = {"bandwidth": float(bandwidth), "neighbours": int(neighbours),
                         "ridge": [float(r) for r in ridge], "class_bandwidth": float(class_bandwidth),
                         "class_neighbours": int(class_neighbours), "class_ridge": float(class_ridge),
                         "scatter_floor": float(scatter_floor),
                         "dof": float(dof), "redundancy_power": float(redundancy_power),
                         "depth_scale_sigma": float(depth_scale_sigma),
                         "grid_step": float(grid_step), "cv_folds": int(cv_folds)}
        self.measure_velocity = bool(measure_velocity)
        self.model_ = None
        self.standards_ = None
        self.tau_ = None
        self.tau_class_ = None
        self.limits_ = None
        self.cv_ = None
        self.skipped_ = []
        self.created_ = None
        self.code_version_ = None

    # -- fitting ---------------------------------------------------------------------------
    def fit(self, spectra, labels, ids=None):
        """Learn the relations from standard spectra.

        Parameters
        ----------
        spectra : sequence of specutils.Spectrum
            The standards (any flux scale; air or vacuum; read with :func:`specan.read`).
        labels : sequence of str or (str, str)
            Their MK types, ``"G2 V"`` or ``("G2", "V")``.
        ids : sequence of str, optional
            Names of the standards (default: the ObsInfo object names).

        Returns
        -------
        Calibration
            ``self``, fitted.
        """
        X = [self._standard_criteria(spec) for spec in spectra]
        if ids is None:
            ids = [get_info(s).object or f"standard {i + 1}" for i, s in enumerate(spectra)]
        return self.fit_criteria(np.array(X), labels, ids=ids)

    def _standard_criteria(self, spectrum):
        """A standard's criteria, measured at this calibration's resolution (which it is taken to have)."""
        return spectrum_criteria(spectrum, self.resolution, measure_velocity=self.measure_velocity,
                                 assume_resolution=self.resolution)["values"]

    def fit_criteria(self, X, labels, ids=None):
        """Learn the relations from already measured criteria (rows in :func:`criteria_names` order).

        Parameters
        ----------
        X : ndarray, shape (n_standards, n_criteria)
        labels : sequence of str or (str, str)
            MK types as in :meth:`fit`.
        ids : sequence of str, optional

        Returns
        -------
        Calibration
            ``self``, fitted.
        """
        X = np.asarray(X, float)
        code, lum, sptypes, lumclasses, emission = _parse_labels(labels)
        if X.shape != (len(code), len(criteria_names())):
            raise ValueError(f"criteria matrix has shape {X.shape}, expected ({len(code)}, "
                             f"{len(criteria_names())})")
        if len(code) < 8:
            raise AnalysisError(f"only {len(code)} standards: at least 8 are needed to calibrate")
        ids = [f"standard {i + 1}" for i in range(len(code))] if ids is None else [str(i) for i in ids]
        step = self.settings["grid_step"]
        grid = np.arange(np.floor(code.min() / step) * step, code.max() + step / 2, step)
        # A standard whose type marks emission lines ("M4.5E", "B2 Ve") says nothing about the
        # absorption those lines have at its type: its criteria on them are left out of the fit.
        # (The JHC library's dMe star, kept in, widened the H-alpha scatter of the M types
        # sixfold, so that H-alpha emission 45% above the continuum went unflagged: measured.)
        X_fit = X.copy()
        X_fit[np.ix_(emission, _EMISSION_SENSITIVE)] = np.nan
        self.model_ = _fit_model(X_fit, code, lum, self.settings, grid)
        self.standards_ = [{"id": i, "sptype": s, "lumclass": lc, "code": float(c), "criteria": x}
                           for i, s, lc, c, x in zip(ids, sptypes, lumclasses, code, X)]
        self._fine = None
        self._weakest = None
        self._internal_cv(X_fit, code, lum)
        from . import __version__

        self.code_version_ = __version__
        self.created_ = datetime.now(timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")
        return self

    def _internal_cv(self, X, code, lum):
        """k-fold CV inside the training set: likelihood temperature and flag thresholds."""
        k = max(2, min(self.settings["cv_folds"], len(code) // 4))
        order = np.argsort(code, kind="stable")
        fold = np.empty(len(code), int)
        fold[order] = np.arange(len(code)) % k     # every fold spans the whole type range
        step = self.settings["grid_step"]
        dof = self.settings["dof"]
        lls, quality, splits = [], [], []
        for f in range(k):
            tr = fold != f
            grid = np.arange(np.floor(code[tr].min() / step) * step, code[tr].max() + step / 2, step)
            fine = _fine(_fit_model(X[tr], code[tr], lum[tr], self.settings, grid),
                         self.settings["depth_scale_sigma"])
            for i in np.where(~tr)[0]:
                ok = np.isfinite(X[i])
                p, ll, z2 = _posterior(X[i], np.zeros(X.shape[1]), fine, dof, 1.0, ok)
                lls.append((ll, fine["grid"], code[i], int(lum[i]) - 1))
                c, _, pl = _summarise(p, fine["grid"])
                gi = int(np.argmin(np.abs(fine["grid"] - c)))
                quality.append(_quality(z2, fine["weights"], ok, gi, int(np.argmax(pl))))
                splits.append(_split_distance(X[i], np.zeros(X.shape[1]), fine, dof, 1.0))
        # Likelihood temperature: the correlated criteria make the raw likelihood too sharp;
        # pick the temperature whose 16-84% intervals hold the true type 68% of the time.
        best = None
        for tau in _TAUS:
            hits, e = [], []
            for ll, grid, truth, _ in lls:
                p = np.exp((ll - ll.max()) / tau)
                p /= p.sum()
                c, err, _ = _summarise(p, grid)
                hits.append(abs(c - truth) <= max(err, 0.5))
                e.append(c - truth)
            cover = float(np.mean(hits))
            # 0.683: probability within 1 sigma of a Gaussian (common practice)
            if best is None or abs(cover - 0.683) < abs(best[1] - 0.683):
                best = (tau, cover, np.array(e))
        self.tau_ = best[0]
        # The class probabilities get their own temperature, the one that maximises the mean
        # log-probability of the standards' published classes (a proper score) in the CV.
        scores = []
        for tau in _TAUS:
            logp = []
            for ll, grid, truth, li in lls:
                p = np.exp((ll - ll.max()) / tau).sum(axis=0)
                logp.append(np.log(max(p[li] / p.sum(), 1e-6)))
            scores.append(float(np.mean(logp)))
        self.tau_class_ = _TAUS[int(np.argmax(scores))]
        err = np.abs(best[2])
        quality = np.array(quality)
        splits = np.array([s for s in splits if s is not None])
        self.limits_ = {
            "quality_p90": float(np.percentile(quality, 90)),
            "quality_p975": float(np.percentile(quality, 97.5)),
            "split_p975": float(max(6.0, np.percentile(splits, 97.5))) if splits.size else 10.0,
        }
        groups = []
        for ll, grid, truth, li in lls:
            if 10 <= truth < 60:
                p = np.exp((ll - ll.max()) / self.tau_class_).sum(axis=0)
                groups.append(_group(li + 1) == _group(int(np.argmax(p)) + 1))
        groups = np.array(groups)
        self.cv_ = {"folds": int(k), "n": int(len(code)), "within_2_subclasses": float(np.mean(err <= 2)),
                    "median_abs_error": float(np.median(err)), "interval_coverage": best[1],
                    "lum_group_right_B_to_K": float(np.mean(groups)) if groups.size else None,
                    "note": "internal k-fold cross-validation of this calibration's own standards, "
                            "refitting per fold (folds interleaved in type)"}

    # -- applying --------------------------------------------------------------------------
    def _check(self):
        if self.model_ is None:
            raise AnalysisError("calibration not fitted: call fit() or Calibration.load()")
        if getattr(self, "_fine", None) is None:
            self._fine = _fine(self.model_, self.settings["depth_scale_sigma"])
        return self._fine

    def classify(self, spectrum, rv=None, resolving_power=None):
        """MK type of a spectrum; see :func:`classify` for the result."""
        meas = spectrum_criteria(spectrum, self.resolution, rv=rv, resolving_power=resolving_power)
        out = self.classify_criteria(meas["values"], meas["noise"], snr=meas["snr"])
        out["notes"] = meas["notes"] + out["notes"]
        out["rv"] = meas["rv"]
        return out

    def classify_criteria(self, values, noise=None, snr=None):
        """MK type from criteria already measured (in :func:`criteria_names` order).

        Parameters
        ----------
        values : ndarray
        noise : ndarray, optional
            1-sigma measurement noise of each criterion (zeros if None).
        snr : float, optional
            S/N per pixel, for the ``low_snr`` flag.

        Returns
        -------
        dict
            As :func:`classify`.
        """
        fine = self._check()
        x = np.asarray(values, float)
        noise = np.zeros_like(x) if noise is None else np.nan_to_num(np.asarray(noise, float))
        ok = np.isfinite(x)
        notes, flags = [], []
        n_ok, n_all = int(ok.sum()), len(x)
        if n_ok < 5:
            raise AnalysisError(f"only {n_ok} of {n_all} classification criteria measurable "
                                "(they need positive flux over 3500-7400 A)")
        dof = self.settings["dof"]
        grid = fine["grid"]
        p, ll, z2 = _posterior(x, noise, fine, dof, self.tau_, ok)
        code, code_err, _ = _summarise(p, grid)
        pl = np.exp((ll - ll.max()) / self.tau_class_).sum(axis=0)
        pl /= pl.sum()
        code_err = max(code_err, 0.5)    # standards' own types are quoted to half a subclass at best
        # The most probable class. (Tried on the library in 10-fold CV: the median of the ordered
        # classes, or the most probable group I / II-III / IV-V first, put 57-58% of B-K stars in
        # the right group against 64% for this.)
        li = int(np.argmax(pl))
        lumclass = number_to_lumclass(_LUMS[li])
        gi = int(np.argmin(np.abs(grid - code)))
        quality = _quality(z2, fine["weights"], ok, gi, li)
        shown = round(code * 2.0) / 2.0          # half subclasses, as MK types are quoted
        sptype = code_to_sptype(shown)
        # flags
        if snr is not None and snr < LOW_SNR:
            flags.append("low_snr")
            notes.append(f"S/N {snr:.0f} per pixel below {LOW_SNR:g}")
        if n_ok < 0.5 * n_all:
            flags.append("out_of_range")
            notes.append(f"only {n_ok} of {n_all} criteria measurable (wavelength coverage)")
        elif (code - grid[0] < 1.0 or grid[-1] - code < 1.0) and quality > self.limits_["quality_p90"]:
            flags.append("out_of_range")
            notes.append(f"at the end of the calibrated range ({code_to_sptype(grid[0])}-"
                         f"{code_to_sptype(grid[-1])}) and poorly matched: the type may lie beyond it")
        if quality > self.limits_["quality_p975"]:
            flags.append("peculiar")
            notes.append(f"criteria fit the {sptype} {lumclass} relations worse than 97.5% of the "
                         f"standards did (fit quality {quality:.2f} > {self.limits_['quality_p975']:.2f})")
        strength = float(np.nansum(np.abs(x[:len(CRITERIA)])))
        if strength < FEATURELESS * self._weakest_standard():
            # the hottest types have the weakest lines, so a spectrum without any fits them
            # within their wide scatter; say that it has no lines instead of quietly calling it O
            flags.append("peculiar")
            notes.append(f"no absorption features: summed depth of the criteria {strength:.2f}, under "
                         f"{FEATURELESS:g} of the weakest standard's (a featureless spectrum; the type means little)")
        names = criteria_names()
        model = _class_means(fine["mean"], fine["offsets"], np.ones(n_all, bool))[gi, li]
        scatter = fine["scatter"][gi]
        # Emission: the line rises above its pseudo-continuum (beyond the standards' own value
        # when that is negative, e.g. TiO in the side bands of M stars) by 5% plus 3 sigma of
        # noise, and by 4 scatters more than the standards of this type. He II 4686 only in
        # O-B stars (Of emission): in cooler stars its side bands hold metal lines.
        for name in ("halpha", "hbeta", "heii_4686"):
            j = names.index(name)
            if name == "heii_4686" and code >= 20:
                continue
            limit = min(model[j], 0.0) + EMISSION_DEPTH - 3.0 * noise[j]
            if ok[j] and x[j] < limit and x[j] < model[j] - 4.0 * scatter[j]:
                flags.append("emission")
                notes.append(f"{name} rises {-x[j]:.0%} above its pseudo-continuum")
                break
        split = _split_distance(x, noise, fine, dof, self.tau_)
        if split is not None and split > self.limits_["split_p975"]:
            flags.append("composite")
            notes.append(f"blue and red criteria disagree by {split:.1f} subclasses "
                         "(two stars of different type?)")
        # result
        # Teff: the published type-Teff scale of each class (specan.mkscales), averaged over the
        # class probabilities; the error adds the spread between the classes' values.
        tk = np.empty(len(_LUMS))
        te = np.empty(len(_LUMS))
        for n, lc in enumerate(_LUMS):
            t, e = teff_from_type(code, number_to_lumclass(lc), code_err)
            tk[n], te[n] = t.to_value(u.K), e.to_value(u.K)
        teff_value = float(np.sum(pl * tk))
        teff = teff_value * u.K
        teff_err = float(np.sqrt(np.sum(pl * (te ** 2 + (tk - teff_value) ** 2)))) * u.K
        criteria = {n: {"value": float(x[j]) if ok[j] else None, "standard": float(model[j])}
                    for j, n in enumerate(names)}
        return {
            "sptype": sptype, "lumclass": lumclass, "mk": f"{sptype} {lumclass}", "code": code,
            "subclass_err": code_err,
            "lumclass_prob": {number_to_lumclass(n): float(v) for n, v in zip(_LUMS, pl)},
            "teff": teff, "teff_err": teff_err,
            "nearest_standards": self._nearest(x, noise, ok, gi),
            "flags": flags, "notes": notes, "fit_quality": quality, "criteria": criteria,
            "calibration": self.source,
        }

    def _weakest_standard(self):
        """Smallest summed absolute depth of the depth criteria among the standards."""
        if getattr(self, "_weakest", None) is None:
            S = np.array([st["criteria"] for st in self.standards_], float)[:, :len(CRITERIA)]
            self._weakest = float(np.min(np.nansum(np.abs(S), axis=1)))
        return self._weakest

    def _nearest(self, x, noise, ok, gi, k=3):
        fine = self._fine
        S = np.array([s["criteria"] for s in self.standards_])
        scale = np.sqrt(fine["scatter"][gi] ** 2 + noise ** 2)
        w = fine["weights"]
        d2 = (S - x) ** 2 / scale ** 2
        both = np.isfinite(d2) & ok
        dist = np.sqrt(np.sum(np.where(both, w * d2, 0.0), axis=1) / np.sum(np.where(both, w, 0.0), axis=1))
        out = []
        for i in np.argsort(dist)[:k]:
            s = self.standards_[i]
            out.append({"id": s["id"], "mk": f"{s['sptype']} {s['lumclass']}", "distance": float(dist[i])})
        return out

    # -- persistence -----------------------------------------------------------------------
    def to_dict(self):
        """Plain, JSON-ready content of the calibration."""
        self._check()
        m = self.model_
        names = criteria_names()
        return {
            "format": FORMAT_NAME,
            "format_version": FORMAT_VERSION,
            "code_version": self.code_version_,
            "created": self.created_,
            "source": self.source,
            "resolution_fwhm_angstrom": float(self.resolution.value),
            "wavelength_medium": "air",
            "type_code_scale": "O0=0, B0=10, A0=20, F0=30, G0=40, K0=50, M0=60 (specan.mktypes)",
            "luminosity_classes": "I=1 ... V=5; offsets on basis [dwarf->giant, giant->supergiant] "
                                  "(specan.classify._lum_basis)",
            "method": "per criterion: kernel-weighted local regression on type code with class offsets; "
                      "classification by a weighted Student-t likelihood on the (code, class) lattice",
            "settings": self.settings,
            "likelihood_temperature": self.tau_,
            "likelihood_temperature_classes": self.tau_class_,
            "limits": self.limits_,
            "internal_cross_validation": self.cv_,
            "criteria": _definitions(),
            "grid_code": _round(m["grid"]),
            "relations": {
                n: {"weight": _round([m["weights"][j]])[0],
                    "mean": _round(m["mean"][:, j]),
                    "offset_giant": _round(m["offsets"][:, j, 0]),
                    "offset_supergiant": _round(m["offsets"][:, j, 1]),
                    "scatter": _round(m["scatter"][:, j])}
                for j, n in enumerate(names)},
            "skipped_standards": list(getattr(self, "skipped_", [])),
            "standards": [{"id": s["id"], "sptype": s["sptype"], "lumclass": s["lumclass"],
                           "code": s["code"], "criteria": _round(s["criteria"])} for s in self.standards_],
        }

    def save(self, path):
        """Write the calibration as indented JSON (human-readable: one line per tabulated relation)."""
        import re

        text = json.dumps(self.to_dict(), indent=1, allow_nan=False)
        # one line per list of numbers/strings, so a relation reads as one row
        text = re.sub(r"\[\s+([^\[\]{}]*?)\s+\]", lambda m: "[" + re.sub(r"\s+", " ", m.group(1)) + "]", text)
        Path(path).write_text(text + "\n", encoding="utf-8")
        return Path(path)

    @classmethod
    def from_dict(cls, data, path=None):
        """Rebuild a calibration from :meth:`to_dict` content."""
        if data.get("format") != FORMAT_NAME:
            raise ReadError(f"not a specan MK calibration (format {data.get('format')!r})", path)
        if int(data.get("format_version", -1)) > FORMAT_VERSION:
            raise ReadError(f"calibration format version {data.get('format_version')} is newer than this "
                            f"specan understands ({FORMAT_VERSION}); update specan", path)
        def bands(defs):   # what was measured; source texts may be edited freely
            return [{k: v for k, v in d.items() if k != "source"} for d in defs]

        if bands(data.get("criteria") or []) != bands(json.loads(json.dumps(_definitions()))):
            raise ReadError("calibration was made with other criteria definitions than this specan "
                            "version uses; refit it with 'specan calibrate'", path)
        s = data["settings"]
        cal = cls(resolution=data["resolution_fwhm_angstrom"] * u.AA, source=data.get("source", ""),
                  bandwidth=s["bandwidth"], neighbours=s["neighbours"], ridge=tuple(s["ridge"]),
                  class_bandwidth=s.get("class_bandwidth", 0.0), class_neighbours=s.get("class_neighbours", 0),
                  class_ridge=s.get("class_ridge", s["ridge"][1]),
                  scatter_floor=s["scatter_floor"], dof=s["dof"], redundancy_power=s["redundancy_power"],
                  depth_scale_sigma=s.get("depth_scale_sigma", 0.0),
                  grid_step=s["grid_step"], cv_folds=s["cv_folds"])
        names = criteria_names()
        rel = data["relations"]
        arr = lambda key: np.array([[np.nan if v is None else v for v in rel[n][key]] for n in names]).T
        cal.model_ = {"grid": np.array(data["grid_code"], float), "mean": arr("mean"),
                      "offsets": np.stack([arr("offset_giant"), arr("offset_supergiant")], axis=-1),
                      "scatter": arr("scatter"),
                      "weights": np.array([rel[n]["weight"] for n in names], float)}
        cal.standards_ = [{"id": st["id"], "sptype": st["sptype"], "lumclass": st["lumclass"],
                           "code": st["code"],
                           "criteria": np.array([np.nan if v is None else v for v in st["criteria"]])}
                          for st in data["standards"]]
        cal.tau_ = float(data["likelihood_temperature"])
        cal.tau_class_ = float(data.get("likelihood_temperature_classes", cal.tau_))
        cal.limits_ = dict(data["limits"])
        cal.cv_ = data.get("internal_cross_validation")
        cal.skipped_ = list(data.get("skipped_standards", []))
        cal.created_ = data.get("created")
        cal.code_version_ = data.get("code_version")
        cal._fine = None
        return cal

    @classmethod
    def load(cls, path):
        """Read a calibration written by :meth:`save`."""
        path = Path(path)
        try:
            data = json.loads(path.read_text(encoding="utf-8"))
        except FileNotFoundError:
            raise ReadError("calibration file not found", path) from None
        except (json.JSONDecodeError, UnicodeDecodeError) as exc:
            raise ReadError(f"calibration file is not valid JSON ({exc})", path) from None
        return cls.from_dict(data, path)


def _group(lumnum):
    return 0 if lumnum <= 1 else (1 if lumnum <= 3 else 2)


def _split_distance(x, noise, fine, dof, tau):
    """|code from blue criteria - code from red criteria| (None if either half is too thin).

    Each half needs at least half of its criteria: the threshold comes from standards with
    both halves whole, and a half reduced to a few criteria gives a far noisier type (an A1 V
    star cut to 3900-5100 A, the classic MK range, has 7 of the 21 red criteria and was
    flagged composite, measured).
    """
    codes = []
    for side in (-1, 1):
        ok = np.isfinite(x) & (_SIDE == side)
        if ok.sum() < max(5, 0.5 * np.sum(_SIDE == side)):
            return None
        p, _, _ = _posterior(x, noise, fine, dof, tau, ok)
        codes.append(_summarise(p, fine["grid"])[0])
    return abs(codes[0] - codes[1])


def _parse_labels(labels):
    """MK labels -> (codes, class numbers, temperature types, class names, emission marked)."""
    codes, lums, sptypes, lumclasses, emission = [], [], [], [], []
    for lab in labels:
        if isinstance(lab, str):
            parts = lab.split()
            if len(parts) < 2:
                raise ValueError(f"MK type {lab!r} has no luminosity class")
            sp, lc = parts[0], " ".join(parts[1:])
        else:
            sp, lc = lab
        n = lumclass_to_number(lc)
        codes.append(sptype_to_code(sp))
        lums.append(float(n))
        sptypes.append(str(sp))
        lumclasses.append(number_to_lumclass(n))
        emission.append(marks_emission(sp, lc))
    return np.array(codes), np.array(lums), sptypes, lumclasses, np.array(emission, bool)


# ---------------------------------------------------------------------------
# Catalogue fitting, the default calibration, the public entry point
# ---------------------------------------------------------------------------

def calibrate_catalog(catalog, source=None, reader_options=None, progress=None, **settings):
    """Fit a :class:`Calibration` from a CSV catalogue of standards.

    Parameters
    ----------
    catalog : str or Path
        CSV with columns ``file`` (path relative to the catalogue) and either
        ``sptype`` and ``lumclass`` or ``mk`` (``"G2 V"``); optional ``id``. The
        reference library's ``catalog.csv`` has this form.
    source : str, optional
        Description written to the calibration (default: the catalogue path).
    reader_options : dict, optional
        Overrides passed to :func:`specan.read` for every file.
    progress : callable, optional
        Called with each file path as it is read.
    **settings
        Passed to :class:`Calibration`.

    Returns
    -------
    Calibration
        Fitted. A row whose file cannot be read or measured, or whose type cannot be
        parsed, is left out and listed in ``skipped_`` (file, reason), which the
        calibration file records; the fit needs at least 8 usable standards.
    """
    from astropy.table import Table

    from .errors import SpecanError
    from .io import read

    catalog = Path(catalog)
    try:
        table = Table.read(catalog, format="ascii.csv")
    except FileNotFoundError:
        raise ReadError("catalogue not found", catalog) from None
    except Exception as exc:  # noqa: BLE001 - any parse failure becomes one clear line
        raise ReadError(f"catalogue is not a readable CSV ({exc})", catalog) from None
    split = "sptype" in table.colnames and "lumclass" in table.colnames
    if "file" not in table.colnames or not (split or "mk" in table.colnames):
        raise ReadError("catalogue needs a file column and either sptype and lumclass or mk "
                        f"(it has {', '.join(table.colnames)})", catalog)
    cal = Calibration(source=source or str(catalog), **settings)
    X, labels, ids, skipped = [], [], [], []
    for row in table:
        path = catalog.parent / str(row["file"])
        if progress is not None:
            progress(path)
        try:
            if split:
                label = (str(row["sptype"]), str(row["lumclass"]))
            else:
                parts = str(row["mk"]).split(maxsplit=1)
                label = (parts[0], parts[1] if len(parts) > 1 else "")
            _parse_labels([label])   # refuses a type or class it cannot read
            spectrum = read(path, **(reader_options or {}))
            values = cal._standard_criteria(spectrum)
        except (SpecanError, ValueError) as exc:
            skipped.append({"file": str(row["file"]), "reason": str(getattr(exc, "reason", exc))})
            continue
        X.append(values)
        labels.append(label)
        ids.append(str(row["id"]) if "id" in table.colnames else Path(str(row["file"])).stem)
    if not X:
        raise AnalysisError(f"no usable standard in the catalogue ({len(skipped)} rows skipped; first: "
                            f"{skipped[0]['file']}: {skipped[0]['reason']})" if skipped else
                            "the catalogue lists no standards", catalog)
    cal.fit_criteria(np.array(X), labels, ids=ids)
    cal.skipped_ = skipped
    return cal


@functools.lru_cache(maxsize=1)
def default_calibration():
    """The calibration shipped with specan (fitted from the JHC 1984 library)."""
    try:
        ref = resources.files("specan.data").joinpath(DEFAULT_FILE)
        text = ref.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise AnalysisError(f"default calibration {DEFAULT_FILE} missing from specan/data: regenerate it "
                            "with scripts/fit_default_calibration.py") from None
    return Calibration.from_dict(json.loads(text), DEFAULT_FILE)


def classify(spectrum, calibration=None, rv=None, resolving_power=None):
    """MK spectral type, luminosity class, Teff and flags of a spectrum.

    Parameters
    ----------
    spectrum : specutils.Spectrum
        Observed spectrum (normalised or not; air or vacuum; any velocity up to
        +-2000 km/s, measured and removed with :mod:`specan.velocity`).
    calibration : Calibration, str or Path, optional
        A fitted calibration or its file; default: the shipped JHC (1984) one.
    rv : astropy.units.Quantity, optional
        Known velocity of the spectrum (skips the velocity measurement).
    resolving_power : float, optional
        Resolving power already estimated from the narrowest lines, used when the
        metadata give none (see :func:`spectrum_criteria`).

    Returns
    -------
    dict
        ``sptype`` ("G2"), ``lumclass`` ("V"), ``mk`` ("G2 V"), ``code`` (O0=0 ... M0=60),
        ``subclass_err`` (1 sigma, subclasses), ``lumclass_prob`` (class -> probability),
        ``teff`` and ``teff_err`` (Quantity K: the type-Teff scale of each class from
        :func:`specan.mkscales.teff_from_type` -- Pecaut & Mamajek 2013 for dwarfs and the other
        scales named there -- averaged over ``lumclass_prob``, the spread added to the error),
        ``nearest_standards`` (list of {id, mk, distance}), ``flags`` (list of the raised
        ones among :data:`FLAGS`), ``notes`` (list of str), ``fit_quality``,
        ``criteria`` (name -> {value, standard}), ``rv`` (velocity removed) and
        ``calibration`` (its source).
    """
    if calibration is None:
        calibration = default_calibration()
    elif not isinstance(calibration, Calibration):
        calibration = Calibration.load(calibration)
    return calibration.classify(spectrum, rv=rv, resolving_power=resolving_power)


# ``specan.classify`` is both this module and, by the public API, a function:
# make the module callable as :func:`classify` (see specan/_callable.py).
from ._callable import make_callable as _make_callable  # noqa: E402

_make_callable(__name__, "classify")

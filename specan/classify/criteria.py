"""The classification criteria: what is measured, and measuring it on plain arrays.

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
"""

from __future__ import annotations

import numpy as np

__all__ = [
    "CRITERIA",
    "RATIOS",
    "SPLIT_WAVELENGTH",
    "SIDES",
    "EMISSION_SENSITIVE",
    "criteria_names",
    "criteria_span",
    "definitions",
    "band_means",
    "measure_criteria",
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


def definitions():
    """The criteria definitions as stored in a calibration file (to check compatibility)."""
    out = []
    for name, spec in CRITERIA.items():
        out.append({"name": name, "kind": "depth", "feature": [list(b) for b in spec["feature"]],
                    "blue": list(spec["blue"]), "red": list(spec["red"]), "source": spec["source"]})
    for name, (a, b, src) in RATIOS.items():
        out.append({"name": name, "kind": "log_ratio", "numerator": a, "denominator": b, "source": src})
    return out


# ---------------------------------------------------------------------------
# The bands as arrays (built once)
# ---------------------------------------------------------------------------

def _band_table():
    """Flatten CRITERIA into arrays of band limits: every distinct band once, and per
    depth criterion the indices of its feature bands and of its blue and red side bands."""
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


def criteria_span():
    """Bluest and reddest wavelength (Angstrom, air) of any band a criterion uses."""
    return float(_BANDS.min()), float(_BANDS.max())


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

#: Criteria whose features lie entirely blueward / redward of this (A) form the two halves
#: compared for the ``composite`` flag (a hot star dominates the blue, a cool one the red);
#: our choice, splitting the criteria list roughly in half.
SPLIT_WAVELENGTH = 4600.0


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


#: Per criterion (in :func:`criteria_names` order): -1 blue of :data:`SPLIT_WAVELENGTH`,
#: +1 red of it, 0 straddling.
SIDES = _criterion_side()

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


#: Per criterion: True where a star's own emission lines would fill in the feature.
EMISSION_SENSITIVE = _emission_sensitive()


# ---------------------------------------------------------------------------
# Measuring
# ---------------------------------------------------------------------------

def band_means(wave, flux, good, bands):
    """Mean flux in each band [lo, hi] (Angstrom) and the fraction of good pixels in it.

    The integral uses the cumulative trapezoid of the flux interpolated over bad
    pixels, so any band costs two interpolations (fast for many bands and trial
    velocities). A band that falls outside the spectrum gets NaN.

    Parameters
    ----------
    wave, flux : ndarray
        Wavelengths (Angstrom, increasing) and flux.
    good : ndarray of bool
        True for usable pixels.
    bands : ndarray, shape (..., 2)
        Band limits (Angstrom).

    Returns
    -------
    mean, frac : ndarray
        Mean flux per band (NaN outside the spectrum) and fraction of good pixels in it.
    """
    f = np.where(good, flux, np.interp(wave, wave[good], flux[good]))
    step = np.diff(wave)
    cum = _cumulative_trapezoid(f, step)
    lo, hi = bands[..., 0], bands[..., 1]
    mean = (np.interp(hi, wave, cum) - np.interp(lo, wave, cum)) / (hi - lo)
    cgood = _cumulative_trapezoid(good.astype(float), step)
    frac = (np.interp(hi, wave, cgood) - np.interp(lo, wave, cgood)) / (hi - lo)
    outside = (lo < wave[0]) | (hi > wave[-1])
    mean = np.where(outside, np.nan, mean)
    frac = np.where(outside, 0.0, frac)
    return mean, frac


def _cumulative_trapezoid(y, step):
    """``scipy.integrate.cumulative_trapezoid(y, x, initial=0)`` of 1-D ``y`` with ``step = np.diff(x)``.

    Its own sums, in its order (the same numbers, tests/test_classify.py): scipy's array-API
    dispatch around them cost more than the sums on a spectrum's few thousand pixels (measured).
    """
    return np.concatenate(([0.0], np.cumsum(step * (y[1:] + y[:-1]) / 2.0)))


def _feature_table():
    """Feature bands of every depth criterion as a padded (criteria, most bands) table.

    Returns the band indices (padding: the criterion's first band again), which entries are
    real, and the widths (0 for padding), so that :func:`_depths` works on all criteria at once.
    """
    most = max(len(f) for f in _FEAT)
    idx = np.array([list(f) + [f[0]] * (most - len(f)) for f in _FEAT], int)
    real = np.array([[True] * len(f) + [False] * (most - len(f)) for f in _FEAT])
    widths = np.where(real, _BANDS[idx, 1] - _BANDS[idx, 0], 0.0)
    return idx, real, widths


_FEAT_IDX, _FEAT_REAL, _FEAT_WIDTHS = _feature_table()


def _depths(mean):
    """Depth of every depth criterion from the mean flux of every band (NaN where undefined).

    All criteria at once on the padded feature table; padding adds exact zeros after the
    real bands, so each sum is the one a loop over the criteria made, to the bit (a loop took
    a third of the criteria's measuring time, measured).
    """
    fb, fr = mean[_BLUE][:, None], mean[_RED][:, None]
    xb, xr = _BAND_MID[_BLUE][:, None], _BAND_MID[_RED][:, None]
    # pseudo-continuum at each feature band's centre, then the band-width-weighted mean
    cont = fb + (fr - fb) * (_BAND_MID[_FEAT_IDX] - xb) / (xr - xb)
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = np.where(_FEAT_REAL, _FEAT_WIDTHS * mean[_FEAT_IDX] / cont, 0.0)
    depth = 1.0 - np.sum(ratio, axis=1) / np.sum(_FEAT_WIDTHS, axis=1)
    # no positive flux beside the feature (a zero or sky-subtracted spectrum): undefined
    return np.where(np.all(cont > 0, axis=1), depth, np.nan)


def _noise(resid, snr, pixel):
    """Expected 1-sigma noise of every criterion at ``snr`` per pixel of ``pixel`` Angstrom."""
    sd = np.sqrt(_NOISE_FACTORS * pixel) / snr
    sr = np.hypot(sd[_RATIO_IDX[:, 0]] / resid[_RATIO_IDX[:, 0]], sd[_RATIO_IDX[:, 1]] / resid[_RATIO_IDX[:, 1]])
    return np.concatenate([sd, sr])


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
    mean, frac = band_means(wave, flux, good, _BANDS)
    depth = _depths(np.where(frac >= min_good, mean, np.nan))
    resid = np.clip(1.0 - depth, 1e-3, None)
    ratios = np.log(resid[_RATIO_IDX[:, 0]] / resid[_RATIO_IDX[:, 1]])
    values = np.concatenate([depth, ratios])
    noise = np.zeros(n_all)
    if snr is not None and np.isfinite(snr) and snr > 0:
        noise = _noise(resid, snr, float(pixel) if pixel else float(np.median(np.diff(wave))))
    return values, noise

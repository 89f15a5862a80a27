#!/usr/bin/env python
"""Regenerate specan/data/templates_miles.fits, the default (empirical) velocity templates.

Built from the development part of the MILES stellar library (Sanchez-Blazquez et al. 2006,
MNRAS 371, 703; Cenarro et al. 2007, MNRAS 374, 664; 2.50 A FWHM: Falcon-Barroso et al.
2011, A&A 532, A95; atmospheric parameters: Cenarro et al. 2007 and Prugniel et al. 2011),
expected in ``../shared/reference/miles`` next to the project (or give its folder).

Each template is the median of the continuum-normalised spectra of a group of library stars:
stars with a full MK type binned in type and luminosity group, and metal-poor stars
([Fe/H] < -1) binned by their atmospheric parameters. The continuum is specan's own
(``specan.prepare``), as for an observed spectrum. Stars whose published type is uncertain
(``:``), peculiar (``p``), weak-lined (``w``), variable (``var``) or shows emission (``e``)
are left out. Members are aligned on each other by cross-correlation before the median; the
median member keeps the library's rest frame (its README: good to a few km/s). Each template's
zero point against laboratory wavelengths is then measured (``specan.templates.measure_zero_point``:
line centres against specan's synthetic spectrum of the type, checked by a segment-wise
cross-correlation with it; see ``specan/templates.py``) and written beside it
(``zero_point_kms``, ``zero_point_err_kms`` and the parts); the velocity stage takes it out.
``--zero-points-only`` keeps the file's fluxes and measures their zero points again (a change of that
method alone needs no library).
The fluxes stay in the library's frame. Putting the templates on the wavelengths of specan's
synthetic spectra by one whole-spectrum correlation was tried and rejected: their blends at
R ~ 2000 move with type, and the zero points came out between -19 and +10 km/s (measured).
What is written: the template fluxes (float32, air wavelengths, library's rest frame) and a
table of groups with their members and zero points, never a star's spectrum.

Usage::

    python scripts/build_library_templates.py [LIBRARY_DIR] [--out PATH] [--zero-points-only]
"""

from __future__ import annotations

import argparse
import re
import sys
import warnings
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "scripts"))
from miles_catalog import WAVE_AA as MILES_WAVE_AA, read_catalog, text, value  # noqa: E402

CITATION = ("MILES stellar library v9.1, development part: Sanchez-Blazquez et al. (2006, MNRAS 371, 703); "
            "Cenarro et al. (2007, MNRAS 374, 664); resolution 2.50 A FWHM: Falcon-Barroso et al. "
            "(2011, A&A 532, A95); parameters: Cenarro et al. (2007), Prugniel et al. (2011)")
#: The library's resolution (its README and FITS keyword FWHM).
FWHM_AA = 2.5
#: Type bins (specan.mktypes codes: B0 = 10, A0 = 20 ... M0 = 60), one template per bin and
#: luminosity group where at least MIN_MEMBERS stars qualify.
TYPE_BINS = ((10, 15), (15, 20), (20, 25), (25, 30), (30, 35), (35, 40), (40, 45), (45, 50), (50, 53),
             (53, 56), (56, 60), (60, 63), (63, 70))
MIN_MEMBERS = 2
#: Metal-poor groups by atmospheric parameters: (name, nominal type, Teff range K, log g range).
METAL_POOR = (
    ("F-G dwarf, metal-poor", "F7", "V", (5600, 6800), (3.6, 5.0)),
    ("G-K dwarf, metal-poor", "G8", "V", (4600, 5600), (3.8, 5.2)),
    ("G-K giant, metal-poor", "G8", "III", (4600, 5600), (0.5, 3.5)),
    ("K giant, metal-poor", "K3", "III", (3800, 4600), (0.0, 2.5)),
)
METAL_POOR_FEH = -1.0
GROUP_NAMES = {"I": "I", "II-III": "III", "IV-V": "V"}


def doubtful(published, sptype):
    """True when a published type carries an uncertain, peculiar, weak-lined, variable or emission mark."""
    tail = published.split(sptype, 1)[-1] if sptype and sptype in published else published
    return ":" in published or re.search(r"p|w|var|e", tail) is not None


def groups(catalog):
    """[(name, sptype, lumclass, [row indices])] of the template groups."""
    from specan.mktypes import code_to_sptype, luminosity_group, sptype_to_code

    out = []
    feh = np.array([value(x) for x in catalog["feh"]])
    teff = np.array([value(x) for x in catalog["teff_k"]])
    logg = np.array([value(x) for x in catalog["logg"]])
    normal = {}
    for i, row in enumerate(catalog):
        sp, lc, pub = text(row["sptype"]), text(row["lumclass"]), text(row["sptype_published"])
        if not (sp and lc) or doubtful(pub, sp) or feh[i] < METAL_POOR_FEH:
            continue
        code = sptype_to_code(sp)
        for lo, hi in TYPE_BINS:
            if lo <= code < hi:
                normal.setdefault(((lo, hi), luminosity_group(lc)), []).append(i)
    for ((lo, hi), group), members in sorted(normal.items()):
        if len(members) >= MIN_MEMBERS:
            codes = [sptype_to_code(text(catalog["sptype"][i])) for i in members]
            sp = code_to_sptype(round(float(np.median(codes)) * 2) / 2, 1)
            out.append((f"{sp} {GROUP_NAMES[group]}", sp, GROUP_NAMES[group], members))
    for name, sp, lc, (t0, t1), (g0, g1) in METAL_POOR:
        members = [i for i in range(len(catalog)) if feh[i] < METAL_POOR_FEH and t0 <= teff[i] < t1
                   and g0 <= logg[i] < g1 and not doubtful(text(catalog["sptype_published"][i]), "")]
        if len(members) >= MIN_MEMBERS:
            out.append((name, sp, lc, members))
    return out


def normalised(path):
    """A library spectrum continuum-normalised by specan (air, rest frame, R at 5000 A)."""
    import specan

    s = specan.read(path, medium="air", resolving_power=5000.0 / FWHM_AA)
    return specan.prepare(s, telluric=False)


def _shift_to(spec, rv):
    from specan.doppler import shift_to_rest

    return shift_to_rest(spec, rv)


def combine(specs, wave):
    """Median of normalised fluxes on ``wave`` (air A); NaN where under half the members are usable."""
    rows = []
    for s in specs:
        w = s.spectral_axis.to_value("AA")
        f = np.where(s.mask, np.nan, s.flux.value) if s.mask is not None else s.flux.value
        good = np.isfinite(f)
        rows.append(np.where(np.interp(wave, w, (~good).astype(float)) > 0, np.nan,
                             np.interp(wave, w[good], f[good])))
    rows = np.array(rows)
    usable = np.isfinite(rows).sum(axis=0)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        med = np.nanmedian(rows, axis=0)
    return np.where(usable * 2 >= len(specs), med, np.nan)


def as_spectrum(wave, flux, name):
    import astropy.units as u
    from specutils import Spectrum

    from specan.obsinfo import META_KEY, ObsInfo

    good = np.isfinite(flux)
    info = ObsInfo(object=name, medium="air", medium_assumed=False, resolving_power=5000.0 / FWHM_AA,
                   normalized=True)
    return Spectrum(flux=np.where(good, flux, 1.0) * u.dimensionless_unscaled, spectral_axis=wave * u.AA,
                    mask=~good, meta={META_KEY: info})


def build_group(paths, wave):
    """(flux on ``wave``, member velocities about their median) of one group."""
    import astropy.units as u

    from specan import velocity

    specs = [normalised(p) for p in paths]
    first = as_spectrum(wave, combine(specs, wave), "first pass")
    shifts = []
    for s in specs:   # align every member on the first-pass median
        v = velocity.measure(s, template=first, errors="td", barycentric=False)["rv_topo"]
        shifts.append(v.to_value(u.km / u.s))
    shifts = np.array(shifts) - np.median(shifts)
    aligned = [_shift_to(s, v * u.km / u.s) for s, v in zip(specs, shifts)]
    return combine(aligned, wave), shifts


def from_file(path):
    """(air wavelengths, fluxes, rows, zero points) of a templates file as written, the zero points measured
    again on its fluxes: for a change of the zero points' method alone (``--zero-points-only``)."""
    from astropy.io import fits
    from astropy.table import Table

    from specan import templates

    with fits.open(path) as hdus:
        h = hdus[0].header
        fluxes = [np.asarray(f, np.float32) for f in hdus[0].data]
        wave = h["CRVAL1"] + h["CDELT1"] * (np.arange(len(fluxes[0])) + 1.0 - h["CRPIX1"])
        table = Table(hdus["GROUPS"].data)
    rows, points = [], []
    for row, flux in zip(table, fluxes):
        rows.append([str(row["name"]), str(row["sptype"]), str(row["lumclass"]), int(row["n_stars"]),
                     float(row["teff_k"]), float(row["logg"]), float(row["feh"]), float(row["member_sd_kms"]),
                     str(row["members"])])
        points.append(templates.measure_zero_point(wave, flux.astype(float), FWHM_AA, rows[-1][1], rows[-1][2]))
    return wave, fluxes, rows, points


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("library", nargs="?", default=str(ROOT.parent / "shared" / "reference" / "miles"))
    parser.add_argument("--out", default=str(ROOT / "specan" / "data" / "templates_miles.fits"))
    parser.add_argument("--zero-points-only", action="store_true",
                        help="keep the fluxes of the file at --out and measure its zero points again")
    args = parser.parse_args(argv)
    from astropy.io import fits
    from astropy.table import Table

    from specan import templates

    if args.zero_points_only:
        wave, fluxes, rows, points = from_file(args.out)
    else:
        library = Path(args.library)
        catalog = read_catalog(library, "build_library_templates")
        if catalog is None:
            return 1
        wave = MILES_WAVE_AA
        fluxes, rows, points = [], [], []
        for name, sptype, lumclass, members in groups(catalog):
            paths = [library / text(catalog["file"][i]) for i in members]
            flux, shifts = build_group(paths, wave)
            fluxes.append(flux.astype(np.float32))
            # measured on the flux as written (float32), so that a re-measurement from the file agrees
            zp = templates.measure_zero_point(wave, fluxes[-1].astype(float), FWHM_AA, sptype, lumclass)
            points.append(zp)
            params = [np.nanmedian([value(catalog[c][i]) for i in members]) for c in ("teff_k", "logg", "feh")]
            rows.append([name, sptype, lumclass, len(members), *params, float(np.std(shifts, ddof=1)),
                         " ".join(text(catalog["id"][i]) for i in members)])
    # groups with too few usable lines keep the library's frame, uncertain by how far the measured
    # groups' frames are from the laboratory's (their rms)
    measured = [z.lines_kms for z in points if z.n_lines >= templates.ZP_MIN_LINES]
    frame_rms = float(np.sqrt(np.mean(np.square(measured)))) if measured else float("nan")
    # the two methods' disagreement over the whole library scales every template's error alike
    birge, n_pairs = templates.library_birge([z for z in points if z.n_lines >= templates.ZP_MIN_LINES])
    print(f"  the two methods over {n_pairs} templates: Birge ratio {birge:.3f}", file=sys.stderr)
    for row, zp in zip(rows, points):
        if zp.n_lines >= templates.ZP_MIN_LINES:
            value_kms, err_kms = zp.lines_kms, templates.zero_point_error(zp, birge)
        else:
            value_kms, err_kms = 0.0, frame_rms
        row[7:7] = [value_kms, err_kms, zp.lines_kms, zp.lines_err_kms, zp.n_lines, zp.check_kms,
                    zp.check_err_kms, zp.n_segments]
        print(f"  {row[0]:24s} {row[3]:3d} stars, zero point {value_kms:+6.2f} +- {err_kms:5.2f} km/s (lines "
              f"{zp.lines_kms:+6.2f} +- {zp.lines_err_kms:4.2f}, {zp.n_lines} lines; check {zp.check_kms:+6.2f} +- "
              f"{zp.check_err_kms:5.2f}, {zp.n_segments} segments)", file=sys.stderr)
    table = Table(rows=rows, names=("name", "sptype", "lumclass", "n_stars", "teff_k", "logg", "feh",
                                    "zero_point_kms", "zero_point_err_kms", "zp_lines_kms", "zp_lines_err_kms",
                                    "zp_n_lines", "zp_check_kms", "zp_check_err_kms", "zp_n_segments",
                                    "member_sd_kms", "members"))
    primary = fits.PrimaryHDU(np.array(fluxes))
    h = primary.header
    h["CTYPE1"], h["CUNIT1"], h["CRPIX1"], h["CRVAL1"], h["CDELT1"] = "AWAV", "Angstrom", 1.0, wave[0], 0.9
    h["FWHM"] = (FWHM_AA, "instrumental FWHM, Angstrom (constant)")
    h["BUNIT"] = ("", "flux over specan's continuum; NaN where undefined")
    h["ORIGIN"] = "specan scripts/build_library_templates.py"
    h["ZPMETHOD"] = ("line centres vs synthetic", "see specan.templates.measure_zero_point")
    h["ZPCHECK"] = ("segment CCF vs synthetic", "zp_check_kms: Balmer lines masked")
    h["ZPLIST"] = ("linelists/stellar.ecsv", "laboratory air wavelengths (NIST ASD)")
    h["ZPSIGN"] = ("lines redward of lab > 0", "sign of zero_point_kms; flux not shifted")
    h["ZPFRAME"] = (frame_rms, "rms of measured zero points, km/s")
    h["ZPERROR"] = ("Maritz-Jarrett SE of median", "x ZPBIRGE in zero_point_err_kms")
    h["ZPBIRGE"] = (birge, "Birge ratio, lines vs check, all templates")
    for k, part in enumerate(re.findall(".{1,68}", CITATION)):
        h[f"CITE{k}"] = part
    hdus = fits.HDUList([primary, fits.BinTableHDU(table, name="GROUPS")])
    hdus.writeto(args.out, overwrite=True)
    print(f"wrote {args.out}: {len(rows)} templates", file=sys.stderr)
    return 0


if __name__ == "__main__":
    sys.exit(main())

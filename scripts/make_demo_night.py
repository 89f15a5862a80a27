#!/usr/bin/env python
"""Write the demo night into ``sample_spectra/``: synthetic spectra and what was planted.

The scenario is invented: one night (2025-09-14/15 UTC) at the "Tordo Ridge
Observatory" (an invented site), a 2,000-4,000 resolving-power spectrograph,
and stars of an invented field named "TRF3-nn". Every spectrum comes from
specan's own synthetic model (:mod:`specan.synth`), so the truth is known:
temperature types O to M and luminosity classes I to V, a double-lined binary,
an emission-line star, a star fast enough to be unbound from the Galaxy, a
low-S/N spectrum, one spectrum without site keywords, and one broken file.

Files are written in three of the formats specan reads: FITS images with a
linear wavelength WCS, FITS binary tables and plain text. Wavelengths are in
air (``CTYPE1 = 'AWAV'``); each spectrum is Doppler-shifted to the topocentric
frame, i.e. by the star's barycentric velocity minus the barycentric correction
of the observatory at mid-exposure, so that the barycentric velocities in
``truth.ecsv`` are what an analysis should recover.

Usage::

    python scripts/make_demo_night.py [--out sample_spectra]
"""

from __future__ import annotations

import argparse
import os
from pathlib import Path

import astropy.units as u
import numpy as np
from astropy.constants import c as C
from astropy.coordinates import EarthLocation, SkyCoord
from astropy.io import fits
from astropy.table import Table
from astropy.time import Time

import specan  # noqa: F401 - configures astropy offline before any time or frame work
from specan import synth
from specan.mktypes import sptype_to_code

# The invented observatory (no real site at this spot that we know of).
SITE_NAME = "Tordo Ridge Observatory"
SITE = EarthLocation.from_geodetic(lon=-6.80 * u.deg, lat=39.30 * u.deg, height=640 * u.m)
NIGHT_START = Time("2025-09-14T20:40:00", scale="utc")

# name, sptype, lumclass, format, R, S/N, rv_bary (km/s), RA, Dec (deg), extras
# RA/Dec are invented positions; the fast star TRF3-16 points near the direction
# of the Sun's Galactic motion (l = 90 deg, b = 0: RA 318 deg, Dec +48 deg, from
# memory), where the Galactic-rest-frame velocity is the heliocentric one plus
# about 250 km/s, so +560 km/s heliocentric is beyond the local escape speed
# (about 550 km/s, from memory) in the Galactic rest frame.
STARS = [
    ("TRF3-01", "O8", "V", "image", 2000, 120, -12.0, 301.2, 35.7, {}),
    ("TRF3-02", "B1", "I", "image", 2000, 150, -31.0, 305.8, 40.1, {}),
    ("TRF3-03", "B6", "III", "table", 2000, 100, 18.5, 310.4, 42.9, {}),
    ("TRF3-04", "A1", "V", "image", 4000, 140, 7.3, 312.0, 30.2, {}),
    ("TRF3-05", "A7", "IV", "text", 2000, 90, -44.0, 316.3, 25.8, {}),
    ("TRF3-06", "F3", "II", "image", 2000, 110, 26.0, 320.9, 51.0, {}),
    ("TRF3-07", "F8", "V", "table", 4000, 100, -7.9, 324.1, 33.3, {}),
    ("TRF3-08", "G2", "V", "image", 2000, 130, 55.2, 328.7, 28.4, {}),
    ("TRF3-09", "G9", "III", "text", 2000, 100, -63.0, 332.5, 45.6, {}),
    ("TRF3-10", "K3", "III", "image", 2000, 120, 14.0, 336.0, 39.9, {}),
    ("TRF3-11", "K6", "V", "table", 2000, 80, -22.4, 340.2, 20.1, {}),
    ("TRF3-12", "M3", "III", "image", 2000, 100, 35.5, 344.8, 47.3, {}),
    ("TRF3-13", "K0", "IV", "text", 2000, 100, 40.0, 349.1, 22.7, {"no_site": True}),
    ("TRF3-14", "F8", "V", "image", 4000, 150, -60.0, 352.6, 36.4,
     {"binary": ("G4", "V", 95.0, 0.75)}),
    ("TRF3-15", "B3", "V", "image", 2000, 120, -9.0, 356.3, 57.9, {"emission": {"H_alpha": 25.0, "H_beta": 3.0}}),
    ("TRF3-16", "G8", "III", "table", 2000, 100, 560.0, 318.0, 48.0, {"fast": True}),
    ("TRF3-17", "A3", "V", "image", 2000, 7, 3.0, 2.5, 31.1, {"low_snr": True}),
    ("TRF3-18", "M4", "V", "image", 2000, 90, -18.0, 6.9, 26.5, {}),
]
BROKEN = "TRF3-19"
EXPTIME = 900.0  # s
WAVE_RANGE = (3800.0, 7200.0)  # Angstrom, air
COUNTS = 2.0e4  # continuum level at 5556 A, to look like an extracted spectrum in ADU


def _topocentric(rv_bary, corr):
    """Topocentric velocity from barycentric velocity and barycentric correction (relativistic sum)."""
    c = C.to_value(u.km / u.s)
    return c * ((1 + rv_bary / c) / (1 + corr / c) - 1)


def _header(name, ra, dec, t_start, R, site=True):
    h = fits.Header()
    h["OBJECT"] = name
    h["OBSERVAT"] = SITE_NAME
    h["TELESCOP"] = "Tordo 1.2 m"
    h["INSTRUME"] = "demo long-slit spectrograph"
    h["DATE-OBS"] = (t_start.isot[:19], "UTC start of exposure")
    h["EXPTIME"] = (EXPTIME, "s")
    h["RA"] = (round(ra, 6), "deg, ICRS")
    h["DEC"] = (round(dec, 6), "deg, ICRS")
    h["RADESYS"] = "ICRS"
    if site:
        x, y, z = (v.to_value(u.m) for v in SITE.geocentric)
        h["OBSGEO-X"] = (round(x, 2), "m, geocentric")
        h["OBSGEO-Y"] = (round(y, 2), "m, geocentric")
        h["OBSGEO-Z"] = (round(z, 2), "m, geocentric")
    h["SPEC_RP"] = (float(R), "resolving power lambda/FWHM")
    return h


def _make_spectrum(spec, R, snr, rv_topo, wave, seed):
    sptype, lumclass, extras = spec
    if "binary" in extras:
        st2, lc2, rv2_topo, ratio = extras["binary"]
        return synth.binary((sptype, lumclass), (st2, lc2), rv1=rv_topo * u.km / u.s, rv2=rv2_topo * u.km / u.s,
                            light_ratio=ratio, resolving_power=R, wave=wave, continuum="blackbody",
                            snr=snr, seed=seed)
    return synth.spectrum(sptype, lumclass, resolving_power=R, wave=wave, rv=rv_topo * u.km / u.s,
                          continuum="blackbody", snr=snr, seed=seed, emission=extras.get("emission"))


def _write(path, kind, header, wave, flux, err):
    if kind == "image":
        h = header.copy()
        h["CTYPE1"] = "AWAV"
        h["CUNIT1"] = "Angstrom"
        h["CRPIX1"] = 1.0
        h["CRVAL1"] = float(wave[0])
        h["CDELT1"] = float(wave[1] - wave[0])
        h["BUNIT"] = "adu"
        fits.PrimaryHDU(flux.astype(np.float32), header=h).writeto(path, overwrite=True)
    elif kind == "table":
        cols = [fits.Column(name="AWAV", format="D", unit="Angstrom", array=wave),
                fits.Column(name="FLUX", format="E", unit="adu", array=flux.astype(np.float32)),
                fits.Column(name="ERR", format="E", unit="adu", array=err.astype(np.float32))]
        table = fits.BinTableHDU.from_columns(cols, name="SPECTRUM")
        fits.HDUList([fits.PrimaryHDU(header=header), table]).writeto(path, overwrite=True)
    else:
        lines = [f"# {k} = {header[k]}" for k in header if k not in ("COMMENT", "HISTORY")]
        lines.append("# AIRORVAC = air")
        lines.append("# wavelength [Angstrom]   flux [adu]   error [adu]")
        lines += [f"{w:.3f} {f:.2f} {e:.2f}" for w, f, e in zip(wave, flux, err)]
        Path(path).write_text("\n".join(lines) + "\n")


def make_night(out: Path) -> Table:
    """Write the demo spectra and ``truth.ecsv`` into ``out``; return the truth table."""
    out.mkdir(parents=True, exist_ok=True)
    rows = []
    suffix = {"image": ".fits", "table": ".fits", "text": ".txt"}
    for i, (name, sptype, lumclass, kind, R, snr, rv, ra, dec, extras) in enumerate(STARS):
        t_start = NIGHT_START + i * 25 * u.min
        t_mid = t_start + EXPTIME / 2 * u.s
        coord = SkyCoord(ra * u.deg, dec * u.deg, frame="icrs")
        corr = coord.radial_velocity_correction(kind="barycentric", obstime=t_mid, location=SITE)
        corr = float(corr.to_value(u.km / u.s))
        rv_topo = _topocentric(rv, corr)
        step = 1.0 if R <= 2000 else 0.5  # about 2.5 pixels per resolution element at 5000 A
        wave = np.arange(WAVE_RANGE[0], WAVE_RANGE[1] + step / 2, step)
        ext = dict(extras)
        rv2 = np.nan
        if "binary" in ext:
            st2, lc2, rv2, ratio = ext["binary"]
            ext["binary"] = (st2, lc2, _topocentric(rv2, corr), ratio)
        spec = _make_spectrum((sptype, lumclass, ext), R, snr, rv_topo, wave * u.AA, seed=1000 + i)
        flux = np.asarray(spec.flux.value) * COUNTS
        err = np.asarray(spec.uncertainty.array) * COUNTS
        header = _header(name, ra, dec, t_start, R, site=not extras.get("no_site"))
        fname = f"{name.lower().replace('-', '_')}{suffix[kind]}"
        _write(out / fname, kind, header, wave, flux, err)

        planted = []
        if "binary" in extras:
            planted.append("double_lined")
        if "emission" in extras:
            planted.append("emission")
        if extras.get("fast"):
            planted.append("unbound")
        if extras.get("low_snr"):
            planted.append("low_snr")
        if extras.get("no_site"):
            planted.append("no_site")
        rows.append({
            "file": fname, "object": name, "format": {"image": "fits-image", "table": "fits-table",
                                                       "text": "text"}[kind],
            "sptype": sptype, "lumclass": lumclass, "code": sptype_to_code(sptype),
            "rv_bary": rv, "rv2_bary": rv2, "rv_topo": rv_topo, "bary_corr": corr,
            "snr": float(snr), "resolving_power": float(R), "site_keywords": not extras.get("no_site"),
            "planted": ",".join(planted),
            "secondary": "{} {}".format(*extras["binary"][:2]) if "binary" in extras else "",
            "broken": False,
        })

    # A broken file: a FITS image cut off in the middle of its data block (a
    # transfer that stopped), so its size is not a multiple of 2880 bytes (the FITS block size;
    # FITS Standard 4.0, from memory).
    h = _header(BROKEN, 10.0, 30.0, NIGHT_START + len(STARS) * 25 * u.min, 2000)
    fname = f"{BROKEN.lower().replace('-', '_')}.fits"
    full = out / fname
    fits.PrimaryHDU(np.ones(3401, np.float32), header=h).writeto(full, overwrite=True)
    data = full.read_bytes()
    full.write_bytes(data[: len(data) // 2 + 17])
    rows.append({"file": fname, "object": BROKEN, "format": "fits-image", "sptype": "", "lumclass": "",
                 "code": np.nan, "rv_bary": np.nan, "rv2_bary": np.nan, "rv_topo": np.nan, "bary_corr": np.nan,
                 "snr": np.nan, "resolving_power": 2000.0, "site_keywords": True, "planted": "broken",
                 "secondary": "", "broken": True})

    truth = Table(rows=rows, names=list(rows[0]))
    for col, unit in (("rv_bary", "km/s"), ("rv2_bary", "km/s"), ("rv_topo", "km/s"), ("bary_corr", "km/s")):
        truth[col].unit = unit
    truth.meta["description"] = (
        "What scripts/make_demo_night.py planted in the demo night (invented scenario: "
        f"{SITE_NAME}, night of {NIGHT_START.isot[:10]}). rv_bary: barycentric radial velocity of the "
        "star (primary for the binary); rv_topo: the topocentric velocity actually applied, for files "
        "without site keywords; planted: what an analysis should flag.")
    truth.meta["site"] = {"name": SITE_NAME, "lat_deg": 39.30, "lon_deg": -6.80, "height_m": 640.0}
    tmp = out / ".truth.ecsv.tmp"
    truth.write(tmp, format="ascii.ecsv", overwrite=True)
    os.replace(tmp, out / "truth.ecsv")
    return truth


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    root = Path(__file__).resolve().parents[1]
    parser.add_argument("--out", type=Path, default=root / "sample_spectra", help="output folder")
    args = parser.parse_args(argv)
    truth = make_night(args.out)
    print(f"wrote {len(truth)} files and truth.ecsv to {args.out}")


if __name__ == "__main__":
    main()

#!/usr/bin/env python
"""Fit the demo night's MK calibration from synthetic standards of its own spectrograph.

An observer classifies best against MK standards taken with the same spectrograph
(``specan calibrate``). The demo night (``scripts/make_demo_night.py``) comes from
specan's synthetic model, whose line strengths are not those of real stars, so the
default calibration (fitted on the Jacoby, Hunter & Christian 1984 library) does not
fit it. This script plays the observer's standards: synthetic spectra of the same
model, resolving power and wavelength range, on a grid of types O5-M5 (every second
subclass) and classes I-V, at rest and S/N 300. None of the demo night's stars is
on the grid's types except by coincidence of code, and the noise differs.

Only the fitted numbers are written (``sample_spectra/tordo_calibration.json``);
the standards themselves are made again by this script whenever needed.

Usage::

    python scripts/make_demo_calibration.py [--out sample_spectra/tordo_calibration.json]
"""

from __future__ import annotations

import argparse
from pathlib import Path

import astropy.units as u
import numpy as np

import specan  # noqa: F401 - offline configuration
from specan import synth
from specan.classify import Calibration
from specan.mktypes import code_to_sptype

ROOT = Path(__file__).resolve().parents[1]
WAVE_RANGE = (3800.0, 7200.0)  # Angstrom, as the demo night (scripts/make_demo_night.py)
RESOLVING_POWER = 2000.0       # the demo spectrograph's low-resolution setting
FWHM = 4.0                     # Angstrom: every spectrum is degraded to this before classifying


def standards():
    """(spectrum, label, id) for the synthetic standards grid."""
    out = []
    seed = 1000
    for code in np.arange(5.0, 66.0, 2.0):
        classes = ("I", "III", "V") + (("II", "IV") if int(code) % 4 == 1 else ())
        for lum in classes:
            sptype = code_to_sptype(code)
            seed += 1
            spec = synth.spectrum(sptype, lum, resolving_power=RESOLVING_POWER, wave_range=WAVE_RANGE * u.AA,
                                  continuum="blackbody", snr=300, seed=seed)
            out.append((spec, f"{sptype} {lum}", f"std-{sptype}-{lum}"))
    return out


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", default=str(ROOT / "sample_spectra" / "tordo_calibration.json"))
    args = ap.parse_args()
    grid = standards()
    cal = Calibration(resolution=FWHM * u.AA, measure_velocity=False,
                               source=f"{len(grid)} synthetic standards of specan's own model (types O5-M5, "
                                      f"classes I-V, R={RESOLVING_POWER:.0f}, at rest, S/N 300) made by "
                                      "scripts/make_demo_calibration.py for the demo night")
    cal.fit([g[0] for g in grid], [g[1] for g in grid], ids=[g[2] for g in grid])
    path = cal.save(args.out)
    cv = cal.cv_
    print(f"wrote {path}: {len(grid)} standards; internal CV {cv['within_2_subclasses']:.0%} within 2 subclasses, "
          f"median error {cv['median_abs_error']:.2f}")


if __name__ == "__main__":
    main()

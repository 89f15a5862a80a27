"""Which listed lines a star of a given type can show at all.

The line list is matched by wavelength alone, so in a cool star a metal blend that happens to sit
at a He I wavelength is "found" as He I (MILES G and K stars showed He I 4144, 3820 and He II 4200,
all Fe I blends; measured). Given the star's MK type, lines of species that need a hotter
photosphere are kept in the table but not counted as detected (``expected`` False); the feature
stays with whatever other line shares it.

Hot species are ruled out in stars clearly cooler than where their lines fade, neutral metals in
stars clearly hotter than where theirs appear; the limits sit about two subclasses beyond the
handbook's, so a type off by that much still keeps a real line.
"""

from __future__ import annotations

import numpy as np

from ..mktypes import parse_mk

__all__ = ["LATEST_CODE", "EARLIEST_CODE", "star_code", "expected_lines"]

#: Latest MK code (O0 = 0, B0 = 10, A0 = 20 ...) at which each species' lines are still
#: expected. Where they fade (Gray & Corbally 2009, "Stellar Spectral Classification", chapters
#: on O, B and A stars; from memory): He II by B0.5, N III and Si IV by B0-B1, C III by B2,
#: Si III, O II and N II by B3-B5, He I by B9.5-A0, C II 4267 by A0; two subclasses added.
LATEST_CODE = {
    "He II": 12.5,
    "N III": 12.0,
    "Si IV": 13.0,
    "C III": 14.0,
    "Si III": 17.0,
    "O II": 17.0,
    "N II": 17.0,
    "He I": 22.0,
    "C II": 22.0,
}


#: Earliest MK code at which each neutral metal's lines are expected: they appear in the early A
#: stars (Fe I 4046, 4271, Ca I 4227, Mg I; Gray & Corbally 2009, from memory), two subclasses
#: allowed. Na I and K I are left out: interstellar Na D and K I 7699 lie on hot stars too.
EARLIEST_CODE = {s: 18.0 for s in ("Fe I", "Mg I", "Ca I", "Cr I", "Mn I", "Ti I", "V I", "Al I", "Li I")}


def star_code(star_type):
    """The MK code of ``star_type`` (a code, or an MK type such as "G2 V" or "K0"), or None."""
    if star_type is None:
        return None
    if isinstance(star_type, (int, float, np.floating, np.integer)):
        code = float(star_type)
        return code if np.isfinite(code) else None
    try:
        return float(parse_mk(str(star_type))[0])
    except (ValueError, TypeError):
        return None


def expected_lines(species, star_type):
    """Boolean array: may each line of ``species`` appear in a star of ``star_type``?

    All True when the type is None or not understood (nothing is ruled out without a type).
    """
    # (an array's own Python strings in one call: the same as str() of each element)
    species = species.tolist() if isinstance(species, np.ndarray) and species.dtype.kind == "U" else [str(s) for s in species]
    code = star_code(star_type)
    if code is None:
        return np.ones(len(species), bool)
    return np.array([EARLIEST_CODE.get(s, -np.inf) <= code <= LATEST_CODE.get(s, np.inf) for s in species], bool)

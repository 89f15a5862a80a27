"""MK spectral types as numbers and back.

Scale (common practice in automated classification): O0 = 0, B0 = 10, A0 = 20,
F0 = 30, G0 = 40, K0 = 50, M0 = 60; a decimal subclass adds its value
(B2.5 = 12.5). Luminosity classes I..V map to 1..5; Ia/Iab/Ib all count as I.
"""

from __future__ import annotations

import math
import re

__all__ = [
    "TEMPERATURE_CLASSES",
    "LUMINOSITY_CLASSES",
    "sptype_to_code",
    "code_to_sptype",
    "lumclass_to_number",
    "number_to_lumclass",
    "parse_mk",
    "luminosity_group",
    "marks_emission",
]

TEMPERATURE_CLASSES = "OBAFGKM"
LUMINOSITY_CLASSES = ("I", "II", "III", "IV", "V")

# Prefixes: MP (metal-poor, as the JHC catalogue writes it), sd (subdwarf) and the Mount Wilson
# dwarf prefix d (from memory). An upper-case D is not a prefix: "DA2" is a white dwarf, whose
# number is not an MK subclass, and must not read as A2.
_SPTYPE_RE = re.compile(r"^\s*(?:[Mm][Pp]|[Ss][Dd]|d)?\s*([OBAFGKMobafgkm])\s*(\d+(?:\.\d+)?)?")
_LUM_RE = re.compile(r"(?<![A-Z])(V|IV|III|II|I)(?:a|ab|b)?(?![A-Z])")


def sptype_to_code(sptype: str) -> float:
    """Numeric code of a temperature type ("G2" -> 42.0, "B2.5" -> 12.5, "MPF4" -> 34.0).

    Parameters
    ----------
    sptype : str
        Temperature type, optionally prefixed (``MP`` metal-poor, ``sd``) and suffixed (``E``).

    Returns
    -------
    float

    Raises
    ------
    ValueError
        If no temperature class letter O..M is found.
    """
    m = _SPTYPE_RE.match(str(sptype))
    if not m:
        raise ValueError(f"not an MK temperature type: {sptype!r} (expected e.g. 'G2', 'B2.5')")
    letter = m.group(1).upper()
    sub = float(m.group(2)) if m.group(2) else 0.0
    return 10.0 * TEMPERATURE_CLASSES.index(letter) + sub


def code_to_sptype(code: float, decimals: int = 1) -> str:
    """Temperature type for a numeric code (42.0 -> "G2", 12.5 -> "B2.5"), clipped to O0..M9.9."""
    if code is None or not math.isfinite(code):
        raise ValueError(f"not a finite spectral code: {code!r}")
    code = min(max(float(code), 0.0), 69.9)
    code = round(code, decimals)
    idx = min(int(code // 10), len(TEMPERATURE_CLASSES) - 1)
    sub = round(code - 10 * idx, decimals)
    if sub >= 10:
        idx, sub = idx + 1, sub - 10
    text = f"{sub:.{decimals}f}".rstrip("0").rstrip(".")
    return f"{TEMPERATURE_CLASSES[idx]}{text or '0'}"


def lumclass_to_number(lumclass: str) -> int:
    """I -> 1 ... V -> 5 (Ia, Iab, Ib -> 1)."""
    m = _LUM_RE.search(str(lumclass).strip())
    if not m:
        raise ValueError(f"not an MK luminosity class: {lumclass!r} (expected I, II, III, IV or V)")
    return LUMINOSITY_CLASSES.index(m.group(1)) + 1


def number_to_lumclass(number: float) -> str:
    """1 -> "I" ... 5 -> "V" (rounded, clipped)."""
    n = int(min(max(round(float(number)), 1), 5))
    return LUMINOSITY_CLASSES[n - 1]


def parse_mk(mk: str) -> tuple[float, str | None]:
    """Split an MK type ("G2 V", "B1.5 Ia", "M4.5E V") into (code, lumclass or None)."""
    parts = str(mk).split()
    code = sptype_to_code(parts[0])
    lum = None
    for p in parts[1:]:
        try:
            lum = number_to_lumclass(lumclass_to_number(p))
            break
        except ValueError:
            continue
    return code, lum


def marks_emission(*parts: str) -> bool:
    """True when an MK type's qualifiers mark emission lines ("M4.5E", "B2 Ve", "O5 If").

    The MK suffix ``e`` marks emission lines, and ``f`` marks the N III / He II emission of
    Of stars (Gray & Corbally 2009, from memory). ``pec`` (peculiar) is not emission. Pass
    the temperature type and the luminosity class as written.
    """
    o_star = False
    for part in parts:
        text = str(part or "").strip()
        m = _SPTYPE_RE.match(text)
        o_star = o_star or bool(m and m.group(1).upper() == "O")
        rest = text[m.end():] if m else _LUM_RE.sub("", text, count=1)
        rest = re.sub(r"pec", "", rest, flags=re.IGNORECASE)
        if re.search(r"e", rest, re.IGNORECASE) or (o_star and re.search(r"f", rest, re.IGNORECASE)):
            return True
    return False


def luminosity_group(lumclass: str) -> str:
    """Coarse luminosity group: "I" (supergiants), "II-III" (giants), "IV-V" (dwarfs)."""
    n = lumclass_to_number(lumclass)
    return "I" if n == 1 else ("II-III" if n <= 3 else "IV-V")

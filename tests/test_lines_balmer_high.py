"""The high Balmer lines (H epsilon, H8-H12) of solar-type stars: windows, blends and errors that hold.

Outside checks:

- Kurucz's model Sun (``rms-solar``, the ``kurucz_sun`` fixture) normalised by its own continuum, so
  the true normalised flux is known; what hydrogen alone holds is not, but it is bounded: a
  hydrogen line's wing deepens toward its centre, so the hydrogen-only flux at any point is at
  least the highest true flux between that point and the centre (the true flux is the hydrogen
  flux times the metal lines' transmission, never above it). Its absorption over a window is at
  most the integral of one less that running maximum: the bound each value is held to, in units
  of its error.
- The MILES library (``miles`` fixture): G0-G2 V stars of near-solar [Fe/H] are one type, so their
  high Balmer lines must agree within their errors; A1-A7 V stars, whose high Balmer lines are
  hydrogen, keep errors of the noise alone.
"""


import astropy.units as u
import numpy as np
import pytest
from astropy.nddata import StdDevUncertainty
from scipy.ndimage import gaussian_filter1d
from specutils import Spectrum

from specan import lines
from specan.obsinfo import ObsInfo

HIGH = ("H_epsilon", "H_8", "H_9", "H_10", "H_11", "H_12")
R_KURUCZ = 2000.0   # resolving power of the rms-solar file (kurucz-fsunallp.2000resam125)


def sun_arrays(w, f, c, resolving_power, snr=100.0, seed=0):
    """(pixels, true normalised flux, noisy normalised flux, noise, continuum scaled to 1) of the
    Kurucz Sun (``w``, ``f``, ``c``: the model's vacuum Angstrom, flux and continuum) over
    3700-4400 A at ``resolving_power``, 2.5 pixels a resolution element, photon noise of ``snr``
    (also used by ``benchmarks/bench_balmer_high.py``)."""
    keep = (w > 3600) & (w < 4500)
    w, y = w[keep], f[keep] / c[keep]
    lnw = np.linspace(np.log(w[0]), np.log(w[-1]), 8 * w.size)
    fine = np.interp(lnw, np.log(w), y)
    if resolving_power < R_KURUCZ:
        step = lnw[1] - lnw[0]
        fine = 1.0 + gaussian_filter1d(fine - 1.0, np.sqrt(1 / resolving_power**2 - 1 / R_KURUCZ**2) / 2.3548 / step)
    pix = np.arange(3700.0, 4400.0, 3700.0 / (resolving_power * 2.5))
    clean = np.interp(np.log(pix), lnw, fine)
    sig = np.sqrt(np.clip(clean, 1e-3, None)) / snr
    noisy = clean + np.random.default_rng(seed).normal(size=clean.size) * sig
    cont = np.interp(pix, w, c[keep])
    return pix, clean, noisy, sig, cont / cont.max()


def _sun(kurucz_sun, resolving_power, with_errors, snr=100.0, seed=0):
    """(spectrum, true normalised flux on its pixels) of the Kurucz Sun at ``resolving_power``."""
    pix, clean, flux, sig, _ = sun_arrays(*kurucz_sun, resolving_power, snr, seed)
    info = ObsInfo(object="Kurucz Sun", medium="vacuum", medium_assumed=False, resolving_power=resolving_power,
                   normalized=True)
    spec = Spectrum(flux=flux * u.dimensionless_unscaled, spectral_axis=pix * u.AA,
                    uncertainty=StdDevUncertainty(sig) if with_errors else None, meta={"specan": info})
    return spec, pix, clean


def hydrogen_bound(pix, clean, centre, lo, hi):
    """Most absorption (Angstrom) hydrogen alone can hold over [lo, hi]: see the module's docstring."""
    sel = (pix >= lo) & (pix <= hi)
    x, f = pix[sel], clean[sel]
    env = np.empty(x.size)
    red = x >= centre
    env[red] = np.maximum.accumulate(f[red])
    env[~red] = np.maximum.accumulate(f[~red][::-1])[::-1]
    dx = np.gradient(x)
    return float(np.sum(np.clip(1.0 - env, 0.0, None) * dx))


def _row(table, line_id):
    return table[list(table["id"]).index(line_id)]


@pytest.fixture(scope="module", params=[(1000.0, True), (1000.0, False), (2000.0, True), (2000.0, False)],
                ids=["R1000-errors", "R1000-no-errors", "R2000-errors", "R2000-no-errors"])
def sun_high(request, kurucz_sun):
    r, with_errors = request.param
    spec, pix, clean = _sun(kurucz_sun, r, with_errors)
    return lines.measure(spec, rv=0 * u.km / u.s), pix, clean


def test_high_balmer_lines_hold_no_more_than_hydrogen_can(sun_high):
    # Before: at R 2000 with an error array H9 read 26.75 +- 0.04 A over 3806-3849 A, where hydrogen
    # can hold at most 25.80 A: a pull (ew - bound) / ew_err of +23.6; at R 1000 H12 read 36.2 +- 0.07 A
    # over 3715-3780 A (bound 34.0, +33). Measured now: every pull between -2.0 and -0.8 (H9 11.9 +-
    # 8.9 A at R 2000). The bound is loose (within 0.1-1 A of the window's whole absorption): it
    # tells a value too high for its error, not a value right.
    t, pix, clean = sun_high
    pulls = {}
    for line_id in HIGH:
        row = _row(t, line_id)
        lo, hi = row["window_min"].to_value(u.AA), row["window_max"].to_value(u.AA)
        if not np.isfinite(row["ew"]) or hi - lo < 1.0:
            continue
        bound = hydrogen_bound(pix, clean, row["wave_vac"].to_value(u.AA), lo, hi)
        pulls[line_id] = (row["ew"].to_value(u.AA) - bound) / row["ew_err"].to_value(u.AA)
    assert len(pulls) >= 4, pulls
    assert max(pulls.values()) < 2.0, pulls


def test_hydrogen_windows_end_half_way_to_the_next_line_of_the_series(sun_high):
    # Before: H12's window at R 1000 was 3715-3780 A (3749-3780 A without an error array), over H11 at
    # 3771.7 A; now 3738-3759 A (3749-3759 A).
    t = sun_high[0]
    h = t[np.asarray(t["species"]) == "H I"]
    at = h["wave_vac"].to_value(u.AA)
    for row in h:
        lo, hi = row["window_min"].to_value(u.AA), row["window_max"].to_value(u.AA)
        if not np.isfinite(lo):
            continue
        inside = [str(o["id"]) for o, x in zip(h, at) if o["id"] != row["id"] and lo < x < hi]
        assert not inside, (row["id"], lo, hi, inside)


def test_the_magnesium_lines_on_h9s_wings_are_named(kurucz_sun):
    # Mg I 3832 and 3838 (NIST ASD: 3832.30 and 3838.29 A in air), 3 A to either side of H9, make no
    # feature of their own on its steep wing; before, H9's blend at R 2000 was empty.
    spec, _, _ = _sun(kurucz_sun, 2000.0, True)
    row = _row(lines.measure(spec, rv=0 * u.km / u.s), "H_9")
    named = str(row["blend"]).split(",")
    assert "MgI_3832" in named and "MgI_3838" in named, row["blend"]


def test_h_epsilon_names_ca_ii_h_and_its_error_covers_it(sun_high):
    # Ca II H lies 1.6 A from H epsilon (NIST ASD: 3968.47 and 3970.07 A in air): unresolved at R
    # 1000-2000. The Sun's H epsilon hydrogen holds no more than its H delta (common practice: the
    # higher members weaken toward the series limit), so an error that covers the Ca II H share
    # reaches down to H delta's value. Before: 18.76 +- 0.04 A at R 2000 (error array) against H
    # delta's 8.02 +- 0.04; now 12.0 +- 6.7 A.
    t = sun_high[0]
    eps, delta = _row(t, "H_epsilon"), _row(t, "H_delta")
    assert "CaII_H" in str(eps["blend"]).split(",")
    low_end, most = eps["ew"] - 2.0 * eps["ew_err"], delta["ew"] + 2.0 * delta["ew_err"]
    assert low_end <= most, (eps["ew"], eps["ew_err"], delta["ew"])


# ----------------------------------------------------------------------------- MILES


@pytest.fixture(scope="module")
def miles_high(miles):
    """{group: {line id: [(ew, ew_err, ew_err_blend), ...]}} of MILES G0-G2 V and A1-A7 V stars."""
    from astropy.table import Table

    import specan
    from specan.prepare import prepare

    cat = Table.read(miles / "catalog.csv", format="ascii.csv")
    groups = {"G0-G2 V": [], "A1-A7 V": []}
    for r in cat:
        sptype, lum = str(r["sptype"]), str(r["lumclass"])
        feh = float(r["feh"]) if not np.ma.is_masked(r["feh"]) else np.nan
        if lum != "V" or not np.isfinite(feh):
            continue
        if sptype in ("G0", "G1", "G1.5", "G2") and abs(feh) < 0.3:
            groups["G0-G2 V"].append(r)
        elif sptype in ("A1", "A2", "A3", "A5", "A7"):
            groups["A1-A7 V"].append(r)
    out = {}
    for name, rows in groups.items():
        per = out.setdefault(name, {})
        for r in rows[:12]:
            spec = prepare(specan.read(miles / str(r["file"]), medium="air", resolving_power=5500.0 / 2.5))
            t = lines.measure(spec, rv=0 * u.km / u.s)
            for line_id in HIGH + ("H_delta",):
                row = _row(t, line_id)
                per.setdefault(line_id, []).append((row["ew"].to_value(u.AA), row["ew_err"].to_value(u.AA),
                                                    row["ew_err_blend"].to_value(u.AA)))
    return out


def _chi2_about_mean(values, delta):
    """chi2/dof of ``values`` about their weighted mean, and how many, leaving out the stars whose
    noise estimate is out of reach: an H delta error below 0.05 A (MILES m0247 G1 V reads 0.004 A
    there, and as little on every line, before this change as after; H delta is not changed)."""
    v = np.array(values, float)[:, :2]
    v = v[np.isfinite(v).all(axis=1) & (np.array(delta, float)[:, 1] >= 0.05)]
    mean = np.average(v[:, 0], weights=1.0 / v[:, 1] ** 2)
    return float(np.sum(((v[:, 0] - mean) / v[:, 1]) ** 2) / (len(v) - 1)), len(v)


_ONE_TYPE_GAPS = {
    "H_8": ("measured chi2/dof 3.9 over 11 MILES G0-G2 V stars (339 before): H8 reads 0.1 and 0.9 A in two of "
            "them (its feature not matched: a window of one line width) against 5-9 A in the rest"),
    "H_11": ("measured chi2/dof 31.9 over 11 MILES G0-G2 V stars (167 before): H11 reads 0.1 A (not matched, a "
             "window of one line width) in 5 of them against 3.5-4.3 A in the rest"),
}


@pytest.mark.reference
@pytest.mark.slow
@pytest.mark.parametrize("line_id", [pytest.param(k, marks=pytest.mark.xfail(strict=True, reason=_ONE_TYPE_GAPS[k]))
                                     if k in _ONE_TYPE_GAPS else k for k in HIGH])
def test_solar_type_stars_agree_within_their_errors(miles_high, line_id):
    # One type, one metallicity: the spread of the values must be what their errors say; chi2/dof
    # below 3 (for 10 degrees of freedom exceeded by chance once in a thousand; common practice).
    # Before (errors of the noise alone): chi2/dof 2.2 (H epsilon), 64 (H9), 6.3 (H10), 34 (H12).
    # Measured now: 0.01, 0.10, 0.15, 0.08: far below 1, for the stated share is most of each error
    # and alike in stars of one type (their values scatter by 0.3-1.1 A).
    chi2, n = _chi2_about_mean(miles_high["G0-G2 V"][line_id], miles_high["G0-G2 V"]["H_delta"])
    assert n >= 8
    assert chi2 < 3.0, chi2


@pytest.mark.reference
@pytest.mark.slow
def test_a_stars_high_balmer_lines_keep_errors_of_the_noise(miles_high):
    # In A stars the high members are hydrogen and agree with H delta: nothing is shared out, and
    # the errors stay the noise's (measured: 0.03-0.21 A over 8 A1-A7 V stars, as before).
    per = miles_high["A1-A7 V"]
    assert len(per["H_9"]) >= 6
    for line_id in HIGH:
        v = np.array(per[line_id], float)
        assert np.all(np.nan_to_num(v[:, 2]) == 0.0), (line_id, v[:, 2])
        assert np.all(v[:, 1] < 0.3), (line_id, v[:, 1])


# ----------------------------------------------------------------------------- synthetic stars


@pytest.mark.slow
@pytest.mark.parametrize("resolving_power", [1000, 2000])
def test_h_epsilon_error_covers_what_hydrogen_alone_holds_in_synthetic_stars(resolving_power):
    # specan's own synthetic stars (noiseless), with and without every line but hydrogen's
    # (synth's species=): H epsilon's hydrogen over its window is known there. Before, the
    # unresolved Ca II H stayed in it with an error of the noise alone: (ew - hydrogen) / ew_err
    # from -2.3 (A2 V) to +32.9 (G2 V) at R 1000, from -9.0 (A2 V) to +475 (K2 V) at R 2000.
    # Measured now: -1.5 to +2.1.
    from specan import synth
    from specan.lines.data import pixel_edges

    pulls = {}
    for sptype in ("A2", "A5", "F0", "F5", "G2", "K2"):
        full = synth.spectrum(sptype, "V", resolving_power=resolving_power)
        alone = synth.spectrum(sptype, "V", resolving_power=resolving_power, species=("H I",))
        row = _row(lines.measure(full), "H_epsilon")
        w = full.spectral_axis.to_value(u.AA)
        sel = (w >= row["window_min"].to_value(u.AA)) & (w <= row["window_max"].to_value(u.AA))
        hydrogen = float(np.sum((1.0 - alone.flux.value)[sel] * np.diff(pixel_edges(w))[sel]))
        pulls[sptype] = (row["ew"].to_value(u.AA) - hydrogen) / row["ew_err"].to_value(u.AA)
    assert max(abs(p) for p in pulls.values()) < 2.5, pulls


def test_the_unassignable_share_reaches_the_command_line_output(kurucz_sun):
    # what `specan lines --json` prints: the share is its own key and inside ew_err (the Kurucz Sun's
    # H9 at R 2000 holds Mg I 3832/3838 on its wing: a share of several Angstrom, measured 8.85)
    from specan.cli.lines import lines_file

    spec, _, _ = _sun(kurucz_sun, 2000.0, True)
    d = lines_file(spec, {}, {"linelist": None, "bands": None, "rv": 0.0, "profile": "auto", "star_type": None})
    row = {r["id"]: r for r in d["lines"]}["H_9"]
    assert row["ew_err_blend_aa"] > 1.0
    assert row["ew_err_aa"] >= row["ew_err_blend_aa"]
    assert {"MgI_3832", "MgI_3838"} <= set(row["blend"])


# ----------------------------------------------------------------------------- windows about the line


@pytest.mark.slow
def test_hydrogen_windows_hold_their_line(kurucz_sun):
    # A hydrogen line's window must reach both sides of the line it measures. Walked from a matched
    # feature that a metal line on the wing had pulled off the line's bottom, the side toward the bottom
    # stopped at once: 7 of 141 hydrogen windows (Kurucz Sun H11 and H8; demo night H epsilon of two
    # stars, H8 of three) lay wholly to the red of the fitted centre (measured; H11 of the Sun at 3770.5 A
    # had 3771.9-3781.4 A). Walks now start at the wide smoothing's bottom (windows.hydrogen_starts).
    from pathlib import Path

    from astropy.table import Table
    from test_lines_batched import kurucz_spectrum

    from specan import prepare, read

    tables = [("Kurucz Sun (rms-solar), R 2000", lines.measure(kurucz_spectrum(kurucz_sun, False)))]
    demo = Path(__file__).resolve().parents[1] / "sample_spectra"
    truth = Table.read(demo / "truth.ecsv", format="ascii.ecsv")
    for row in truth[~truth["broken"]]:
        spec = prepare(read(demo / row["file"]))
        tables.append((row["file"], lines.measure(spec, rv=row["rv_topo"] * u.km / u.s)))
    outside, counted = [], 0
    for name, table in tables:
        h = table[(table["species"] == "H I") & np.isfinite(table["window_min"].value)]
        counted += len(h)
        for r in h:
            if not r["window_min"].value < r["wave_obs"].value < r["window_max"].value:
                outside.append((name, str(r["id"])))
    assert counted > 120
    assert not outside, outside

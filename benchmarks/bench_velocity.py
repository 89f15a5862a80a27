"""Speed and accuracy of specan.velocity.measure.

1. Against ``specutils.analysis.template_correlate`` on the same inputs: the Kurucz model Sun
   (``rms-solar``, vacuum, R = 2000) shifted to random velocities, sampled on linear pixels
   with photon noise, and the same noiseless model at rest on the same pixels as the template.
   specutils returns the correlation and lags; its velocity is the lag of the maximum refined
   by a parabola through three points (common practice). Time per spectrum and the scatter of
   (measured - true) are printed for both.
2. Scatter / Cramer-Rao bound for a pure shift (computed from the noiseless model and the
   noise) by S/N and resolving power, matched template.
3. ``--speed``: ms per 4,000-pixel spectrum, side by side in one run: specan with no template
   (every built-in template scored, velocity and error budget) against
   ``specutils.analysis.template_correlate`` with one template (the Kurucz model at rest).
4. ``--user``: the user's path with no template: the Kurucz Sun times an unknown smooth
   response (not normalised; error arrays on half the spectra), R 1,000-5,000, S/N 10-200,
   +-900 km/s: bias (also in % of a resolution element), scatter / Cramer-Rao bound (from the
   noiseless input; Bouchy, Pepe & Queloz 2001), and the pulls (measured - true) / rv_err:
   their sd about their mean and their rms about zero (which also counts the bias).
5. ``--other-types``: specan's synthetic stars of types the synthetic grid lacks, same figures; on specan's
   own pixels (2.5 a FWHM) and on the user path's linear pixels (finer than the velocity grid in the red).
6. ``--floor``: where the time of one velocity goes (the speed test's spectra, steady state): CPU
   ms of each step of ``velocity.measure``, and of the transforms inside (FFTs, spline solves), and the
   Python and C function calls a spectrum makes (each has a cost of its own whatever its arrays' size);
   ``--night-set``: the same on ``bench_pipeline.py``'s 40 spectra (read and prepared, with the
   barycentric correction and the Galactic rest frame).
7. ``--neighbours``: the automatic choice tries the neighbouring synthetic types of the best grid
   type only where they can enter the mixture (``specan.velocity.choice.NEIGHBOUR_GAIN``): on the
   speed test's spectra, ``bench_pipeline.py``'s 40, the demo night, synthetic stars off the grid, the
   JHC (1984) library and MILES stars without their own groups' templates (where present), how far the
   neighbours came above the best grid type (all tried), how often they were skipped, whether any
   choice (templates, weights) or velocity changed, and the CPU time with and without the skip.
8. ``--miles``: MILES library stars (``../shared/reference/miles``, at rest in the library's
   frame), each measured without the library templates whose group it belongs to.
9. ``--kurucz``: the noiseless Kurucz Sun at rest (and at -640, +35, +820 km/s), R 1,000, 2,000 and
   5,000 (the model file is R ~ 2000: "5,000" is R 2000 data declared finer), no template: the
   bias of the default choice (and the R it was measured at: the stated one, or the one the correlation's
   width shows where that is coarser), and of each library template alone (``library:<name>``) with the
   zero point the file gives it; the check of the templates' laboratory zero points (the Kurucz
   model is static, its lines at laboratory wavelengths; it is not used to set them).
10. ``--against DIR``: the speed test's spectra measured by this checkout's specan and by the specan of
   another checkout ``DIR`` (e.g. ``git archive <commit> | tar -x -C DIR``) in one process, each
   spectrum by both in turn (the order alternating): CPU ms per spectrum of each and their ratio, with
   the load drift of a shared machine cancelled (runs in separate processes differ by +-20% here); the same
   on ``bench_pipeline.py``'s spectra as the night run calls the stage (no error array, barycentric); then
   on how many of the speed test's, ``bench_pipeline.py``'s, the demo night's, the JHC (1984) and the
   MILES inputs (own groups out) the best template, the mixture (names, weights) or the velocity (by more
   than 0.05 of its error) differ between the two, and by how much at most; and on how many any number of
   the result (velocities, errors, weights, scores, the CCF) differs in any bit ("any bit moved").

11. ``--noise``: the noise error without an error array (the flux's own noise) against with one, on
   inputs of known noise: the Kurucz Sun (photon and constant noise, R 1,000-5,000, S/N 10-300) and
   MILES stars with white noise added; the velocity's scatter over realisations / the noise error.

12. ``--bias-parts``: where the user path's bias at R 2000 comes from, on many realisations (``--quick``: 60 a
   cell, else 400; the standard error is printed): the Kurucz Sun x a smooth response at S/N 10-100 and noiseless,
   error arrays on every other spectrum, no template; the bias, and for each template of the mixtures its mean
   weight, its own velocity's bias and its share of the bias (weight x bias); then one library template
   alone (``library:G8 V``), with and without error arrays, to separate the choice from the rest.

13. ``--pull-parts``: the off-grid synthetic types of ``--other-types`` one type at a time (R 2000, S/N 100,
   12 velocities a type, ``--quick`` 6), on specan's own pixels and on linear ones: each type's mean offset and its
   scatter about it against the error budget's parts, the pulls' sd within each type and over all.

Run:  python benchmarks/bench_velocity.py [--quick] [--speed] [--floor] [--night-set] [--user] [--other-types] [--neighbours]
      [--miles] [--kurucz] [--noise] [--bias-parts] [--pull-parts] [--against DIR]

Timings depend on the machine's load; on a shared machine OPENBLAS_NUM_THREADS=1 avoids BLAS
threads fighting other processes (the figures in the issue-4 report were measured that way).
"""

from __future__ import annotations

import os
import sys
import time
from pathlib import Path

import astropy.units as u
import numpy as np
from astropy.nddata import StdDevUncertainty
from scipy import fft as sfft
from scipy.interpolate import make_interp_spline
from scipy.ndimage import gaussian_filter1d
from specutils import Spectrum

from specan import velocity
from specan.obsinfo import META_KEY, ObsInfo

C_KMS = 299792.458  # km/s, exact (SI definition of the metre)
KMS = u.km / u.s
R_KURUCZ = 2000.0


def kurucz():
    """Band-limited (8x FFT-upsampled) Kurucz solar model, normalised, on ln(lambda_vac)."""
    import solar

    path = Path(solar.__file__).parent / "data_files" / "kurucz-fsunallp.2000resam125.txt"
    d = np.loadtxt(path)
    w = d[:, 0] * 10.0
    keep = (w > 3000) & (w < 10000)
    w, f, c = w[keep], d[keep, 1], d[keep, 2]
    lnw = np.log(w)
    step = (lnw[-1] - lnw[0]) / (lnw.size - 1)
    y = f / c - 1.0
    fine = sfft.irfft(sfft.rfft(y), y.size * 8) * 8
    grid = lnw[0] + step / 8 * np.arange(fine.size)
    cache = {}

    def model(r):
        if r not in cache:
            yy = fine
            if r < R_KURUCZ:
                yy = gaussian_filter1d(fine, np.sqrt(1 / r**2 - 1 / R_KURUCZ**2) / 2.3548 / (step / 8))
            sel = (grid > np.log(3300)) & (grid < np.log(9600))
            cache[r] = make_interp_spline(grid[sel], 1.0 + yy[sel], k=3)
        return cache[r]

    return model


def pixels(r, lo=3850.0, hi=8650.0):
    return np.arange(lo, hi, lo / (r * 2.5))


def observe(model, r, v, snr=None, seed=0):
    pix = pixels(r)
    flux = model(r)(np.log(pix) - np.log(velocity.doppler_factor(v * KMS)))
    unc = None
    if snr is not None:
        sig = np.sqrt(np.clip(flux, 1e-3, None)) / snr
        flux = flux + np.random.default_rng(seed).normal(size=flux.size) * sig
        unc = StdDevUncertainty(sig)
    info = ObsInfo(object="Kurucz Sun", medium="vacuum", medium_assumed=False, resolving_power=r, normalized=True)
    return Spectrum(flux=flux * u.dimensionless_unscaled, spectral_axis=pix * u.AA, uncertainty=unc,
                    meta={META_KEY: info})


def crb(model, r, v, snr):
    clean = observe(model, r, v).flux.value
    d = (observe(model, r, v + 0.5).flux.value - observe(model, r, v - 0.5).flux.value) / 1.0
    return 1.0 / np.sqrt(np.sum((d / (np.sqrt(clean) / snr)) ** 2))


def specutils_velocity(obs, tmpl, method="direct", subtract_continuum=False):
    from specutils.analysis import template_correlate

    if subtract_continuum:
        obs = Spectrum(flux=obs.flux - 1 * u.dimensionless_unscaled, spectral_axis=obs.spectral_axis,
                       uncertainty=obs.uncertainty)
        tmpl = Spectrum(flux=tmpl.flux - 1 * u.dimensionless_unscaled, spectral_axis=tmpl.spectral_axis)
    corr, lag = template_correlate(obs, tmpl, method=method)
    c, lg = np.asarray(corr.value), np.asarray(lag.to_value(KMS))
    i = int(np.argmax(c))
    y0, y1, y2 = c[i - 1], c[i], c[i + 1]
    d = 0.5 * (y0 - y2) / (y0 - 2 * y1 + y2)
    return lg[i] + d * (lg[i + 1] - lg[i - 1]) / 2


def compare(model, n, snr, r=2000.0):
    rng = np.random.default_rng(1)
    tmpl = observe(model, r, 0.0)
    tmpl.meta[META_KEY] = ObsInfo(object="Kurucz rest", medium="vacuum", medium_assumed=False,
                                  resolving_power=r, normalized=True)
    rows = {k: ([], []) for k in ("specan (both errors)", "specan (errors=td)", "specutils direct",
                                  "specutils fft", "specutils fft, flux-1")}
    for i in range(n):
        v = rng.uniform(-500, 500)
        s = observe(model, r, v, snr=snr, seed=100 + i)
        for name, fn in (
            ("specan (both errors)", lambda: velocity.measure(s, template=tmpl, barycentric=False)["rv"].value),
            ("specan (errors=td)", lambda: velocity.measure(s, template=tmpl, barycentric=False,
                                                            errors="td")["rv"].value),
            ("specutils direct", lambda: specutils_velocity(s, tmpl, "direct")),
            ("specutils fft", lambda: specutils_velocity(s, tmpl, "fft")),
            ("specutils fft, flux-1", lambda: specutils_velocity(s, tmpl, "fft", subtract_continuum=True)),
        ):
            t0 = time.perf_counter()
            got = fn()
            rows[name][0].append(time.perf_counter() - t0)
            rows[name][1].append(got - v)
    print(f"\n== R = {r:.0f}, S/N = {snr}, {n} spectra, Kurucz Sun, matched template on the same pixels ==")
    print(f"{'method':24s} {'median time':>12s} {'rms error':>10s} {'bias':>8s}")
    for name, (t, e) in rows.items():
        e = np.asarray(e)
        print(f"{name:24s} {1e3 * np.median(t):9.1f} ms {np.sqrt(np.mean(e**2)):7.3f} km/s {np.mean(e):+7.3f}")
    return rows


def crb_table(model, n):
    print("\n== scatter / Cramer-Rao bound, matched template, Kurucz Sun ==")
    print(f"{'R':>6s} {'S/N':>5s} {'scatter km/s':>13s} {'CRB km/s':>9s} {'ratio':>6s} {'mean rv_err':>12s}")
    for r in (1000.0, 1500.0, 2000.0):
        tmpl = observe(model, r, 0.0)
        for snr in (10, 30, 100, 300):
            errs, reps = [], []
            for i in range(n):
                v = 123.0
                res = velocity.measure(observe(model, r, v, snr=snr, seed=int(r) * 1000 + snr * 100 + i), template=tmpl,
                                       barycentric=False)
                errs.append(res["rv"].value - v)
                reps.append(res["rv_err"].value)
            sc, b = np.std(errs, ddof=1), crb(model, r, 123.0, snr)
            print(f"{r:6.0f} {snr:5d} {sc:13.3f} {b:9.3f} {sc / b:6.2f} {np.mean(reps):12.3f}")


def auto_speed():
    from specan import synth

    print("\n== specan.velocity.measure timing, automatic template (14-type grid + refinement), R = 2000 ==")
    s = synth.spectrum("K1", "III", rv=-321 * KMS, snr=50, seed=1)
    velocity.measure(s)  # templates built and cached
    for errors in ("both", "td"):
        t = []
        for _ in range(10):
            t0 = time.perf_counter()
            res = velocity.measure(s, errors=errors)
            t.append(time.perf_counter() - t0)
        print(f"errors={errors:5s}: median {1e3 * np.median(t):.1f} ms per spectrum "
              f"({s.flux.size} pixels), rv {res['rv'].value:.2f} (true -321), {res['template']}")


SPEED_PIX = np.arange(4000.0, 4000.0 + 4000 * 0.625, 0.625)  # 4,000 pixels, R 2000 at ~2.5-4 pixels per FWHM
SPEED_R = 2000.0


def speed_spectrum(model, v, snr=None, seed=0, start=None):
    """The Kurucz Sun at ``v`` km/s on the 4,000 pixels of the speed test (``start``: shifted pixels)."""
    pix = SPEED_PIX if start is None else start + (SPEED_PIX - SPEED_PIX[0])   # another wavelength solution
    flux = model(SPEED_R)(np.log(pix) - np.log(velocity.doppler_factor(v * KMS)))
    unc = None
    if snr:
        sig = np.sqrt(np.clip(flux, 1e-3, None)) / snr
        flux = flux + np.random.default_rng(seed).normal(size=flux.size) * sig
        unc = StdDevUncertainty(sig)
    info = ObsInfo(object="Kurucz Sun", medium="vacuum", medium_assumed=False, resolving_power=SPEED_R,
                   normalized=True)
    return Spectrum(flux=flux * u.dimensionless_unscaled, spectral_axis=pix * u.AA, uncertainty=unc,
                    meta={META_KEY: info})


def speed(model, n):
    """ms per 4,000-pixel spectrum: specan (no template: all built-in templates) vs specutils (one template)."""
    PIX, r = SPEED_PIX, SPEED_R

    def obs(v, snr=None, seed=0, start=None):
        return speed_spectrum(model, v, snr, seed, start)

    tmpl = obs(0.0)
    rng = np.random.default_rng(5)
    spectra = [(v, obs(v, 50.0, 200 + i)) for i, v in enumerate(rng.uniform(-300, 300, n))]
    t0 = time.perf_counter()
    velocity.measure(spectra[0][1], barycentric=False)
    first = time.perf_counter() - t0
    rows = {"specan, no template (all built-in templates, error budget)": [],
            "specutils template_correlate, one template": []}
    cpu = {k: [] for k in rows}
    errs = {k: [] for k in rows}
    load = os.getloadavg()[0]
    for v, s in spectra:
        for name, fn in zip(rows, (lambda: velocity.measure(s, barycentric=False)["rv"].value,
                                   lambda: specutils_velocity(s, tmpl, "fft", subtract_continuum=True))):
            t, c = time.perf_counter(), time.process_time()
            got = fn()
            rows[name].append(time.perf_counter() - t)
            cpu[name].append(time.process_time() - c)
            errs[name].append(got - v)
    load = max(load, os.getloadavg()[0])
    print(f"\n== speed: {PIX.size}-pixel Kurucz Sun spectra, R {r:.0f}, S/N 50, {n} spectra ==")
    print(f"specan's first spectrum of the set-up (templates built and transformed): {1e3 * first:.0f} ms")
    med = {k: 1e3 * np.median(t) for k, t in rows.items()}
    # CPU time (median) as well as wall time: on a shared machine the wall time also counts other processes
    cpu_med = {k: 1e3 * np.median(t) for k, t in cpu.items()}
    for name in rows:
        e = np.asarray(errs[name])
        print(f"{name:60s} median {med[name]:7.1f} ms (CPU {cpu_med[name]:5.1f} ms)  "
              f"rms error {np.sqrt(np.mean(e ** 2)):6.2f} km/s")
    a, b = med.values()
    ca, cb = cpu_med.values()
    print(f"specutils / specan time ratio: {b / a:.2f} wall, {cb / ca:.2f} CPU (target >= 5); specan < 5 ms: {a < 5}"
          f" (load average {load:.2f} on {os.cpu_count()} cores)")
    # A night whose exposures each carry their own wavelength solution: the pixels start up to
    # 0.6 A apart. specan's grid, and with it every template bank, follows the spectrum's own
    # pixels, so each such spectrum builds its set-up again (a known cost, see the README).
    own = [obs(v, 50.0, 300 + i, start=4000.0 + x) for i, (v, x) in
           enumerate(zip(rng.uniform(-300, 300, min(n, 10)), rng.uniform(0.0, 0.6, min(n, 10))))]
    c_own = []
    for s in own:
        c = time.process_time()
        velocity.measure(s, barycentric=False)
        c_own.append(time.process_time() - c)
    print(f"specan, each spectrum on its own wavelength solution (pixels shifted 0-0.6 A), {len(own)} spectra: "
          f"median CPU {1e3 * np.median(c_own):.1f} ms (the same pixels: {cpu_med[next(iter(cpu_med))]:.1f} ms)")


def against(model, n, other, rounds=4):
    """CPU ms per speed-test spectrum of this specan and of ``other``'s (a checkout), interleaved in one process."""
    import importlib
    import shutil
    import tempfile

    folder = Path(tempfile.mkdtemp(prefix="specan-against-"))
    # the other checkout's package under another name (its imports are relative): both in one process
    shutil.copytree(Path(other) / "specan", folder / "specan_other", ignore=shutil.ignore_patterns("__pycache__"))
    sys.path.insert(0, str(folder))
    try:
        import specan as this

        packages = {"this checkout": this, f"{other}": importlib.import_module("specan_other")}
        for pkg in packages.values():
            for module in (".velocity", ".obsinfo", ".prepare"):
                importlib.import_module(pkg.__name__ + module)
        velocities = np.random.default_rng(5).uniform(-300, 300, n)

        def spectrum(pkg, v, seed, pix=SPEED_PIX):
            flux = model(SPEED_R)(np.log(pix) - np.log(pkg.velocity.doppler_factor(v * KMS)))
            sig = np.sqrt(np.clip(flux, 1e-3, None)) / 50.0
            flux = flux + np.random.default_rng(seed).normal(size=flux.size) * sig
            info = pkg.obsinfo.ObsInfo(object="Kurucz Sun", medium="vacuum", medium_assumed=False,
                                       resolving_power=SPEED_R, normalized=True)
            return Spectrum(flux=flux * u.dimensionless_unscaled, spectral_axis=pix * u.AA,
                            uncertainty=StdDevUncertainty(sig), meta={pkg.obsinfo.META_KEY: info})

        spectra = {name: [spectrum(pkg, v, 200 + i) for i, v in enumerate(velocities)] for name, pkg in packages.items()}
        for name, pkg in packages.items():   # set-ups built, caches filled
            for s in spectra[name]:
                pkg.velocity.measure(s, barycentric=False)
        names = list(packages)
        cpu = _alternated(packages, spectra, len(velocities), rounds, barycentric=False)
        print(f"\n== side by side in one process: {n} speed-test spectra x {rounds}, each by both in turn "
              f"(load average {os.getloadavg()[0]:.2f}) ==")
        _print_alternated(names, cpu)
        # a night whose exposures each carry their own wavelength solution (pixels 0-0.6 A apart): every
        # spectrum a new pixel set-up (more spectra than the set-up stores keep, so none is found again)
        starts = 4000.0 + np.random.default_rng(6).uniform(0.0, 0.6, max(n, 24))
        own = {name: [spectrum(pkg, v, 300 + i, x + (SPEED_PIX - SPEED_PIX[0]))
                      for i, (v, x) in enumerate(zip(np.resize(velocities, starts.size), starts))]
               for name, pkg in packages.items()}
        load = os.getloadavg()[0]
        cpu = _alternated(packages, own, starts.size, 2, barycentric=False)
        print(f"\n== each on its own wavelength solution: {starts.size} speed-test spectra x 2, each by both in "
              f"turn (load average {load:.2f}) ==")
        _print_alternated(names, cpu)
        night_side_by_side(packages, n, rounds)
        choice_changes(packages, [{name: spectra[name][i] for name in names} for i in range(n)], n)
    finally:
        sys.path.remove(str(folder))
        shutil.rmtree(folder, ignore_errors=True)


def night_side_by_side(packages, n, rounds=3):
    """CPU ms per velocity as the night run calls it, each package's in turn: ``bench_pipeline.py``'s
    spectra read and prepared by each package (FITS without an error array: the flux's own noise; with
    time, site and pointing: the barycentric correction and v_GRF), ``velocity.measure(spectrum)`` with
    its defaults, as ``specan.pipeline`` calls it."""
    import tempfile

    sys.path.insert(0, str(Path(__file__).resolve().parent))
    from bench_pipeline import make_spectra

    names = list(packages)
    with tempfile.TemporaryDirectory() as tmp:
        paths = make_spectra(Path(tmp), n)
        spectra = {name: [pkg.prepare(pkg.read(str(p))) for p in paths] for name, pkg in packages.items()}
    for name, pkg in packages.items():   # caches filled
        for s in spectra[name]:
            pkg.velocity.measure(s)
    load = os.getloadavg()[0]
    cpu = _alternated(packages, spectra, n, rounds)
    print(f"\n== as the night run calls it: {n} bench_pipeline.py spectra (read, prepared; no error array; "
          f"barycentric) x {rounds}, each by both in turn (load average {load:.2f} -> {os.getloadavg()[0]:.2f}) ==")
    _print_alternated(names, cpu)


def _alternated(packages, spectra, n, rounds, **kw):
    """{package name: CPU seconds of each ``velocity.measure(spectra[name][i], **kw)``}, the packages in
    turn, their order swapped from one spectrum to the next (the machine's drift falls on both alike)."""
    names = list(packages)
    cpu = {name: [] for name in names}
    for r in range(rounds):
        for i in range(n):
            for name in (names if (r + i) % 2 == 0 else names[::-1]):
                c = time.process_time()
                packages[name].velocity.measure(spectra[name][i], **kw)
                cpu[name].append(time.process_time() - c)
    return cpu


def _print_alternated(names, cpu):
    """Each package's CPU median and quartiles (ms), and the second's over the first's, per spectrum."""
    for name in names:
        t = 1e3 * np.asarray(cpu[name])
        print(f"{name:40s} CPU median {np.median(t):6.2f} ms (quartiles {np.percentile(t, 25):.2f}-"
              f"{np.percentile(t, 75):.2f})")
    ratio = np.asarray(cpu[names[1]]) / np.asarray(cpu[names[0]])
    print(f"{names[1]} / this checkout, per spectrum: median {np.median(ratio):.3f}")


def _change_sets(packages, speed_inputs, n):
    """{set name: [(inputs per package name, exclude)]}: the speed test's spectra, ``bench_pipeline.py``'s,
    the demo night, the JHC (1984) library and MILES stars without their own groups' templates (where
    present), each read and prepared by each package."""
    import tempfile

    sys.path.insert(0, str(Path(__file__).resolve().parent))
    from bench_pipeline import make_spectra

    root = Path(__file__).resolve().parents[1]
    reference = root.parent / "shared" / "reference"
    sets = {"speed test (Kurucz Sun)": [(x, ()) for x in speed_inputs]}

    def read_all(path, **kw):
        try:
            return {name: pkg.prepare(pkg.read(path, **kw)) for name, pkg in packages.items()}
        except Exception:    # the demo night's damaged files
            return None

    with tempfile.TemporaryDirectory() as tmp:
        sets["bench_pipeline spectra"] = [(read_all(p), ()) for p in make_spectra(Path(tmp), n)]
    sets["demo night"] = [(read_all(p), ()) for p in sorted((root / "sample_spectra").glob("trf3_*"))]
    if (reference / "jhc1984" / "catalog.csv").is_file():
        from astropy.table import Table

        rows = Table.read(reference / "jhc1984" / "catalog.csv", format="ascii.csv")
        sets["JHC (1984) library"] = [(read_all(reference / "jhc1984" / r["file"]), ()) for r in rows]
    miles = _miles_inputs(n)
    if miles:
        sets["MILES stars, own groups out"] = [(read_all(reference / "miles" / r["file"], resolving_power=2000.0,
                                                         medium="air"), ex) for _, ex, r in miles]
    return {k: [(x, ex) for x, ex in v if x is not None] for k, v in sets.items()}


def choice_changes(packages, speed_inputs, n):
    """On how many inputs the two packages' template choice, mixture or velocity differ (no template given)."""
    names = list(packages)
    print(f"\n== {names[1]} against this checkout: template choice, mixture and velocity on the same inputs ==")
    print(f"{'set':28s} {'n':>4s} {'best differs':>12s} {'mixture differs':>15s} {'|drv|>0.05 err':>14s} "
          f"{'max |drv|/err':>13s} {'max |derr|/err':>14s} {'any bit moved':>13s}")
    for label, inputs in _change_sets(packages, speed_inputs, n).items():
        best = mix = moved = bits = 0
        drv = derr = 0.0
        for spectra, exclude in inputs:
            res = [packages[k].velocity.measure(spectra[k], barycentric=False, exclude_templates=exclude)
                   for k in names]
            a, b = res
            best += a["template"] != b["template"]
            mix += ([(m["name"], round(m["weight"], 6)) for m in a["templates"]]
                    != [(m["name"], round(m["weight"], 6)) for m in b["templates"]])
            d = abs((a["rv"] - b["rv"]) / b["rv_err"]).value
            moved += d > 0.05
            drv = max(drv, d)
            derr = max(derr, abs((a["rv_err"] - b["rv_err"]) / b["rv_err"]).value)
            bits += _numbers(a) != _numbers(b)
        print(f"{label:28s} {len(inputs):4d} {best:12d} {mix:15d} {moved:14d} {drv:13.2e} {derr:14.2e} {bits:13d}")


def _numbers(result):
    """Every number and name of a ``velocity.measure`` result as exact bytes (velocities, errors and their
    parts, the mixture's names, weights, scores and offsets, the template scores, the CCF): equal only where
    not one bit moved."""
    out = []
    for key in sorted(result):
        value = result[key]
        if key == "templates":
            value = [(m["name"], m["weight"], m["score"], m["rv_offset"].value) for m in value]
        elif key == "template_scores":
            value = sorted(value.items())
        elif hasattr(value, "unit"):
            value = np.asarray(value.value).tobytes()
        elif isinstance(value, np.ndarray):
            value = value.tobytes()
        out.append((key, repr(value)))
    return out


#: The steps of ``velocity.measure`` timed by :func:`floor` (names in ``specan.velocity``).
STEPS = ("observe_on_grid", "settle_resolving_power", "lag_window", "observed_side", "choose_template",
         "_refined_peaks", "Correlation", "ccf_about_peak", "tonry_davis", "estimate_errors", "segment_errors",
         "detect_companion", "apply_frames", "velocity_flags", "assumption_flags", "result_dict")


def floor(model, n):
    """Where the time of one velocity goes on the speed test's spectra (:func:`where_time_goes`)."""
    spectra = [speed_spectrum(model, v, 50.0, 200 + i)
               for i, v in enumerate(np.random.default_rng(5).uniform(-300, 300, n))]
    where_time_goes(spectra, "speed-test spectra (Kurucz Sun, 4,000 px, no barycentric correction)",
                    barycentric=False)


def night_set(n):
    """The same on ``benchmarks/bench_pipeline.py``'s spectra (4,000 px FITS files, types O-M, read and
    prepared as the night run does; with time, site and pointing: barycentric correction and v_GRF)."""
    import tempfile

    import specan

    sys.path.insert(0, str(Path(__file__).resolve().parent))
    from bench_pipeline import make_spectra

    with tempfile.TemporaryDirectory() as tmp:
        spectra = [specan.prepare(specan.read(str(p))) for p in make_spectra(Path(tmp), n)]
    where_time_goes(spectra, "bench_pipeline.py spectra (read, prepared; barycentric correction and v_GRF)")


def where_time_goes(spectra, label, **options):
    """Where the time of one velocity goes, and what its transforms alone cost.

    Every spectrum (no template, every built-in template scored, the error budget) is measured
    once to fill the set-up's caches, then again with every step of ``velocity.measure`` timed
    (CPU), and the CPU time inside the FFTs (scipy.fft) and the cached spline solves counted
    apart: what the method costs at the least as it stands (its transforms), against the Python
    and array work around them.
    """
    import collections

    import specan.velocity as vel
    from scipy import fft as scipy_fft

    from specan.velocity import grid

    n = len(spectra)
    for s in spectra:
        velocity.measure(s, **options)
    spent = collections.defaultdict(float)

    def timed(func, name):
        def wrapper(*args, **kwargs):
            c = time.process_time()
            try:
                return func(*args, **kwargs)
            finally:
                spent[name] += time.process_time() - c
        return wrapper

    saved = {name: getattr(vel, name) for name in STEPS}
    saved_fft = {name: getattr(scipy_fft, name) for name in ("rfft", "irfft")}
    saved_splines = dict(grid._SPLINES)
    for name, func in saved.items():
        setattr(vel, name, timed(func, name))
    for name, func in saved_fft.items():
        setattr(scipy_fft, name, timed(func, "transforms: FFT"))
    for key, ops in saved_splines.items():
        grid._SPLINES[key] = grid.SplineOperators(timed(ops.forward, "transforms: spline solves"),
                                                  timed(ops.adjoint, "transforms: spline solves"))
    try:
        c = time.process_time()
        for s in spectra:
            velocity.measure(s, **options)
        total = time.process_time() - c
    finally:
        for name, func in saved.items():
            setattr(vel, name, func)
        for name, func in saved_fft.items():
            setattr(scipy_fft, name, func)
        grid._SPLINES.update(saved_splines)
    per = {k: 1e3 * v / n for k, v in spent.items()}
    print(f"\n== where the time goes: {n} {label}, CPU ms per spectrum (steady state; load average "
          f"{os.getloadavg()[0]:.2f}) ==")
    print(f"{'velocity.measure, whole':40s} {1e3 * total / n:7.2f}")
    for name in sorted((k for k in per if not k.startswith("transforms")), key=lambda k: -per[k]):
        if per[name] >= 0.05:
            print(f"  {name:38s} {per[name]:7.2f}")
    inside = sum(v for k, v in per.items() if k.startswith("transforms"))
    for name in sorted(k for k in per if k.startswith("transforms")):
        print(f"{name:40s} {per[name]:7.2f}")
    print(f"{'transforms together (the floor as built)':40s} {inside:7.2f} ({100 * inside / (1e3 * total / n):.0f}% of the whole)")
    python_calls, builtin_calls = calls_per_spectrum(spectra, **options)
    print(f"calls a spectrum: {python_calls:.0f} Python functions, {builtin_calls:.0f} built-in and C functions "
          "(numpy's, scipy's; operators on arrays not counted): each costs ~0.3-3 us whatever its size")


def calls_per_spectrum(spectra, **options):
    """(Python function calls, calls of built-in/C functions) a ``velocity.measure`` makes per spectrum, in
    steady state (the interpreter's profile hook counts them; array operators are not calls and are not
    counted)."""
    counts = {"call": 0, "c_call": 0}

    def hook(frame, event, arg):
        if event in counts:
            counts[event] += 1

    sys.setprofile(hook)
    try:
        for s in spectra:
            velocity.measure(s, **options)
    finally:
        sys.setprofile(None)
    return counts["call"] / len(spectra), counts["c_call"] / len(spectra)


def _pull_line(label, dv, err, resel, crb_kms, ms):
    dv, err = np.asarray(dv), np.asarray(err)
    pull = dv / err
    ratio = np.std(dv, ddof=1) / crb_kms if crb_kms else float("nan")
    print(f"{label:26s} bias {dv.mean():+6.2f} ({100 * dv.mean() / resel:+5.2f}% resel) scatter {np.std(dv, ddof=1):6.2f}"
          f" /CRB {ratio:5.2f} pull sd {np.std(pull, ddof=1):4.2f} rms {np.sqrt(np.mean(pull ** 2)):4.2f} "
          f"mean err {err.mean():6.2f} {ms:5.0f} ms")


def _measured(spectrum, v_true, dv, err, noise=None):
    """Measure one spectrum with no template; append (measured - true) and rv_err (and to ``noise`` the
    noise error); return the seconds."""
    t0 = time.perf_counter()
    res = velocity.measure(spectrum, barycentric=False)
    dt = time.perf_counter() - t0
    dv.append(res["rv"].value - v_true)
    err.append(res["rv_err"].value)
    if noise is not None:
        noise.append(res["rv_err_noise"].value)
    return dt


def user_path(model, n):
    """The Kurucz Sun as a user's file (smooth response, no template), R 1000-5000, S/N 10-200."""
    print("\n== user path: Kurucz Sun x smooth response, no template, +-900 km/s ==")
    lo, hi = 3850.0, 7300.0
    for r in (1000.0, 2000.0, 5000.0):
        pix = np.arange(lo, hi, lo / (r * 2.5))
        resp = 1.0 + 0.3 * np.sin((pix - lo) / (hi - lo) * 2.5)
        f = lambda vv: model(r)(np.log(pix) - np.log(velocity.doppler_factor(vv * KMS)))  # noqa: E731
        clean, deriv = f(0.0), f(0.5) - f(-0.5)
        for snr in (10.0, 30.0, 100.0, 200.0):
            rng = np.random.default_rng(7)
            dv, err, noise, t = [], [], [], 0.0
            crb_kms = 1.0 / np.sqrt(np.sum((deriv / (np.sqrt(clean) / snr)) ** 2))
            for i in range(n):
                v = rng.uniform(-900, 900)
                flux = f(v)
                sig = np.sqrt(np.clip(flux, 1e-3, None)) / snr
                obs = (flux + np.random.default_rng(100 + i).normal(size=flux.size) * sig) * resp
                info = ObsInfo(object="sun", medium="vacuum", medium_assumed=False, resolving_power=r)
                s = Spectrum(flux=obs * u.dimensionless_unscaled, spectral_axis=pix * u.AA,
                             uncertainty=StdDevUncertainty(sig * resp) if i % 2 == 0 else None, meta={META_KEY: info})
                t += _measured(s, v, dv, err, noise)
            _pull_line(f"R {r:5.0f} S/N {snr:4.0f}", dv, err, C_KMS / r, crb_kms, 1e3 * t / n)
            # the template's zero point is one systematic for every spectrum of a cell (one star, one
            # template): noise realisations cannot sample it, so the pulls against the noise error alone,
            # about their mean, say whether the noise part holds (bias aside)
            pn = np.asarray(dv) / np.asarray(noise)
            print(f"{'':26s} noise alone: pull sd {np.std(pn, ddof=1):4.2f} (about the mean {np.mean(pn):+6.2f}), "
                  f"mean noise err {np.mean(noise):6.3f}")


OTHER_TYPES = (("F3", "IV"), ("G4", "IV"), ("K2.5", "II"), ("A7", "III"), ("K5", "III"), ("G0", "III"))


def other_types(n, linear=False):
    """specan's synthetic stars of types the synthetic grid lacks (no template given); ``linear``: on linear
    pixels as the user path's (2.5 pixels a FWHM at 3850 A, 4.7 at 7300 A: finer than the velocity grid's 3
    points a FWHM in the red, where its cell means matter), not on specan's own 2.5 pixels a FWHM in ln lambda."""
    from specan import synth

    where = "linear pixels 2.5-4.7 per FWHM" if linear else "2.5 pixels per FWHM"
    print(f"\n== synthetic stars of types off the synthetic grid, no template, +-900 km/s ({where}) ==")
    for r in (1000.0, 2000.0, 5000.0):
        for snr in (10.0, 30.0, 100.0, 200.0):
            rng = np.random.default_rng(11)
            dv, err, t = [], [], 0.0
            for i in range(n):
                st, lc = OTHER_TYPES[i % len(OTHER_TYPES)]
                v = rng.uniform(-900, 900)
                place = ({"wave": np.arange(3850.0, 7300.0, 3850.0 / (r * 2.5)) * u.AA} if linear
                         else {"wave_range": (3850, 7300) * u.AA})
                s = synth.spectrum(st, lc, resolving_power=r, rv=v * KMS, snr=snr, seed=300 + i, **place)
                t += _measured(s, v, dv, err)
            _pull_line(f"R {r:5.0f} S/N {snr:4.0f}", dv, err, C_KMS / r, None, 1e3 * t / n)


def neighbours(model, n):
    """How far the best synthetic type's neighbours come above it, and whether trying them only where
    they can enter the mixture changes any choice (against trying them always)."""
    import tempfile

    import specan
    from specan import synth, templates
    from specan.velocity import choice

    sys.path.insert(0, str(Path(__file__).resolve().parent))
    from bench_pipeline import make_spectra

    sets = {"speed test (Kurucz Sun)": [speed_spectrum(model, v, 50.0, 200 + i)
                                        for i, v in enumerate(np.random.default_rng(5).uniform(-300, 300, n))]}
    with tempfile.TemporaryDirectory() as tmp:
        sets["bench_pipeline spectra"] = [specan.prepare(specan.read(str(p))) for p in make_spectra(Path(tmp), n)]
    sets["demo night"] = []
    for p in sorted((Path(__file__).resolve().parents[1] / "sample_spectra").glob("trf3_*")):
        try:
            sets["demo night"].append(specan.prepare(specan.read(p)))
        except specan.errors.SpecanError:
            pass     # the demo night's damaged files
    rng = np.random.default_rng(11)
    sets["synthetic, off the grid"] = [
        synth.spectrum(*OTHER_TYPES[i % len(OTHER_TYPES)], resolving_power=float(rng.choice([1000.0, 2000.0, 5000.0])),
                       rv=rng.uniform(-900, 900) * KMS, snr=float(rng.choice([10.0, 30.0, 100.0])), seed=300 + i,
                       wave_range=(3850, 7300) * u.AA) for i in range(n)]
    excluded = [()] * sum(len(v) for v in sets.values())
    reference = Path(__file__).resolve().parents[2] / "shared" / "reference"
    if (reference / "jhc1984" / "catalog.csv").is_file():
        from astropy.table import Table

        rows = Table.read(reference / "jhc1984" / "catalog.csv", format="ascii.csv")
        sets["JHC (1984) library"] = [specan.prepare(specan.read(reference / "jhc1984" / r["file"])) for r in rows]
        excluded += [()] * len(rows)
    miles = _miles_inputs(n)
    if miles:
        sets["MILES stars, own groups out"] = [s for s, _, _ in miles]
        excluded += [ex for _, ex, _ in miles]
    grid = {f"synthetic {a} {b}" for a, b in templates.automatic_types()}
    print("\n== neighbouring synthetic types: tried only where they can enter the mixture, against always ==")
    print(f"{'set':28s} {'n':>3s} {'skipped':>7s} {'most gain':>9s} {'choice changed':>14s} {'max |drv|/err':>13s} "
          f"{'CPU ms (always -> where they can)':>34s}")
    exclusions = iter(excluded)
    for label, spectra in sets.items():
        gain, skipped, changed, drv, t_fast, t_slow = [], 0, 0, 0.0, 0.0, 0.0
        for s in spectra:
            ex = next(exclusions)
            saved, choice.NEIGHBOUR_GAIN = choice.NEIGHBOUR_GAIN, np.inf
            try:     # a first call builds every template both ways use (timed: steady state)
                velocity.measure(s, barycentric=False, exclude_templates=ex)
            finally:
                choice.NEIGHBOUR_GAIN = saved
            c = time.process_time()
            fast = velocity.measure(s, barycentric=False, exclude_templates=ex)
            t_fast += time.process_time() - c
            saved, choice.NEIGHBOUR_GAIN = choice.NEIGHBOUR_GAIN, np.inf
            try:
                c = time.process_time()
                slow = velocity.measure(s, barycentric=False, exclude_templates=ex)
                t_slow += time.process_time() - c
            finally:
                choice.NEIGHBOUR_GAIN = saved
            sc = slow["template_scores"]
            syn = [v for k, v in sc.items() if k in grid]
            near = [v for k, v in sc.items() if k.startswith("synthetic") and k not in grid]
            if syn and near:
                gain.append(max(near) - max(syn))
            skipped += any("neighbouring synthetic types not tried" in x for x in fast["notes"])
            if [(m["name"], m["weight"]) for m in fast["templates"]] != [(m["name"], m["weight"]) for m in slow["templates"]]:
                changed += 1
            drv = max(drv, abs((fast["rv"] - slow["rv"]) / slow["rv_err"]).value)
        k = len(spectra)
        print(f"{label:28s} {k:3d} {skipped:7d} {max(gain, default=float('nan')):9.4f} {changed:14d} {drv:13.1e} "
              f"{1e3 * t_slow / k:20.2f} -> {1e3 * t_fast / k:5.2f}")
    print(f"(allowance NEIGHBOUR_GAIN {choice.NEIGHBOUR_GAIN}; CPU ms per spectrum in steady state, load average "
          f"{os.getloadavg()[0]:.2f})")


def _miles_inputs(n):
    """[(spectrum, names of its own groups' library templates)] of ``n`` MILES stars spread over the
    catalogue (read at R 2000, air), or [] where the library is absent."""
    from astropy.io import fits
    from astropy.table import Table

    import specan
    from specan import templates

    folder = Path(__file__).resolve().parents[2] / "shared" / "reference" / "miles"
    if not (folder / "catalog.csv").is_file():
        return []
    cat = Table.read(folder / "catalog.csv", format="ascii.csv")
    with fits.open(Path(specan.__file__).parent / "data" / templates.LIBRARY_FILE) as hdus:
        groups = Table(hdus["GROUPS"].data)
    member_of = {}
    for g in groups:
        for star in str(g["members"]).split():
            member_of.setdefault(star, []).append(str(g["name"]))
    rows = [r for r in cat if str(r["mk"]).strip() not in ("", "--")]
    pick = rows[:: max(1, len(rows) // n)][:n]
    # R 2000: the library's 2.5 A FWHM at 5000 A
    return [(specan.read(folder / r["file"], resolving_power=2000.0, medium="air"), tuple(member_of.get(str(r["id"]), ())),
             r) for r in pick]


def _member_sd():
    """{library template name: sd of its members' rest frames about the group's, km/s}.

    How far a group's members sat from each other's rest frames when the templates were built
    (scripts/build_library_templates.py aligns them by cross-correlation and writes that sd,
    ``member_sd_kms``): how uncertain "truth 0" is for one of its stars (it also holds the
    members' mismatch).
    """
    from astropy.io import fits
    from astropy.table import Table

    import specan
    from specan import templates

    with fits.open(Path(specan.__file__).parent / "data" / templates.LIBRARY_FILE) as hdus:
        groups = Table(hdus["GROUPS"].data)
    if "member_sd_kms" in groups.colnames:
        return {str(g["name"]): float(g["member_sd_kms"]) for g in groups}
    # files before the laboratory zero points: the median member's standard error, 1.2533 sd / sqrt(n)
    return {str(g["name"]): float(g["zero_point_err_kms"]) * np.sqrt(int(g["n_stars"])) / 1.2533 for g in groups}


def kurucz_rows(model):
    """Bias (km/s) on the noiseless Kurucz Sun of the default choice and of every library template."""
    from specan import templates

    print("\n== Kurucz Sun, noiseless, no template: bias km/s (and % of a resolution element) ==")
    rs = (1000.0, 2000.0, 5000.0)
    print(f"{'template':26s} {'zero pt':>8s} " + " ".join(f"{'R ' + str(int(r)):>17s}" for r in rs))
    rows = [("default (at rest)", None, (0.0,)), ("default (-640/35/820)", None, (-640.0, 35.0, 820.0))]
    rows += [(f"library {t.name}", f"library:{t.name}", (0.0,)) for t in templates.library_templates()]
    zp = {f"library {t.name}": getattr(t, "zero_point_kms", 0.0) for t in templates.library_templates()}
    for label, template, speeds in rows:
        cells, chosen, used = [], [], []
        for r in rs:
            dv = []
            for v in speeds:
                res = velocity.measure(observe(model, r, v), template=template, barycentric=False)
                dv.append(res["rv"].to_value(KMS) - v)
                chosen.append(res["template"])
                used.append(f"{res['resolving_power']:.0f}")
            b = float(np.mean(dv))
            cells.append(f"{b:+7.2f} ({100 * b / (C_KMS / r):+5.2f}%)")
        z = f"{zp[label]:+8.2f}" if label in zp else f"{'':8s}"
        print(f"{label:26s} {z} " + " ".join(f"{c:>17s}" for c in cells)
              + (f"  [{', '.join(sorted(set(chosen)))}; R used {'/'.join(dict.fromkeys(used))}]" if template is None else ""))


def miles_stars(n):
    """MILES stars (at rest in the library's frame) without their own groups' templates."""
    from specan import templates

    pick = _miles_inputs(n)
    if not pick:
        print("\n(MILES reference library not present: skipped)")
        return
    print(f"\n== MILES stars ({len(pick)}), each without its own groups' templates; truth 0 (library frame) ==")
    member_sd = _member_sd()
    typical_sd = float(np.median(list(member_sd.values())))
    dv, err, truth_sd, names = [], [], [], []
    for s, exclude, r in pick:
        res = velocity.measure(s, barycentric=False, exclude_templates=exclude)
        dv.append(res["rv"].value)
        err.append(res["rv_err"].value)
        truth_sd.append(np.mean([member_sd[g] for g in exclude]) if exclude else typical_sd)
        names.append(f"{r['mk']}->{res['template_type']}")
    _pull_line("MILES", dv, err, C_KMS / 2000.0, None, float("nan"))
    # The library's rest frame is not a truth to the km/s: each star's own rest frame scatters about
    # its group's by the members' sd above (median over groups printed). With that in quadrature,
    # the pulls say whether rv_err covers the rest; the line above is the pull against "truth 0".
    both = np.sqrt(np.asarray(err) ** 2 + np.asarray(truth_sd) ** 2)
    print(f"the stars' own rest frames scatter by {np.median(truth_sd):.2f} km/s (median of their groups' member sd; "
          f"all groups: {typical_sd:.2f})")
    _pull_line("MILES, truth sd included", dv, both, C_KMS / 2000.0, None, float("nan"))
    # Library templates whose file gives laboratory zero points measure on the laboratory scale; a
    # star at rest in the library's frame then reads about its own groups' zero point (the frame
    # its group's median member had), not 0.
    zero = {t.name: getattr(t, "zero_point_kms", 0.0) for t in templates.library_templates()}
    own = [np.mean([zero[g] for g in exclude]) if exclude else np.nan for _, exclude, _ in pick]
    lab = np.isfinite(own)
    if any(zero.values()) and lab.any():
        _pull_line(f"MILES, truth own zero pt ({lab.sum()})", np.asarray(dv)[lab] - np.asarray(own)[lab],
                   both[lab], C_KMS / 2000.0, None, float("nan"))
    print("types (star -> best template):", ", ".join(names[:20]))


def noise_pulls(model, n, miles_n=6):
    """The noise error without an error array against with one, on inputs of known noise: the Kurucz Sun x
    a smooth response (not normalised) at one velocity, photon (sqrt(flux)) and constant noise, R 1000-5000,
    S/N 10-300, ``n`` realisations each measured with its error array and without; then MILES stars with
    white noise of known sigma added (their own noise is small and smoothed), measured against the star
    without the added noise. Printed per cell: the median noise error (``rv_err_noise``) of each and the
    velocity's scatter over the realisations divided by it (1 where the noise error is right; the bias is
    removed with the mean), the median rv_err."""
    print(f"\n== noise error without an error array (flux) against with one (arr); {n} realisations at one velocity ==")
    lo, hi = 3850.0, 7300.0
    v = -345.6

    def cell(make, truth):
        out = {}
        for with_err in (True, False):
            rows = []
            for i in range(n):
                s = make(i, with_err)
                res = velocity.measure(s, barycentric=False)
                rows.append((res["rv"].value - truth, res["rv_err_noise"].value, res["rv_err"].value))
            a = np.array(rows)
            out[with_err] = (np.median(a[:, 1]), np.std(a[:, 0], ddof=1) / np.sqrt(np.mean(a[:, 1] ** 2)), np.median(a[:, 2]))
        return " | ".join(f"{'arr' if k else 'flux'} err_noise {e:7.3f} scatter/err_noise {p:5.2f} rv_err {t:6.2f}"
                          for k, (e, p, t) in out.items()) + f" | ratio flux/arr {out[False][0] / out[True][0]:5.2f}"

    for kind in ("photon", "constant"):
        for r in (1000.0, 2000.0, 5000.0):
            pix = np.arange(lo, hi, lo / (r * 2.5))
            resp = 1.0 + 0.3 * np.sin((pix - lo) / (hi - lo) * 2.5)
            flux = model(r)(np.log(pix) - np.log(velocity.doppler_factor(v * KMS)))
            for snr in (10.0, 30.0, 100.0, 300.0):
                sig = (np.sqrt(np.clip(flux, 1e-3, None)) if kind == "photon" else np.ones_like(flux)) / snr

                def make(i, with_err, sig=sig, flux=flux, pix=pix, resp=resp, r=r):
                    noisy = (flux + np.random.default_rng(100 + i).normal(size=flux.size) * sig) * resp
                    info = ObsInfo(object="sun", medium="vacuum", medium_assumed=False, resolving_power=r)
                    return Spectrum(flux=noisy * u.dimensionless_unscaled, spectral_axis=pix * u.AA,
                                    uncertainty=StdDevUncertainty(sig * resp) if with_err else None, meta={META_KEY: info})

                print(f"Kurucz {kind:8s} R {r:5.0f} S/N {snr:4.0f} | {cell(make, v)}", flush=True)
    from specan.obsinfo import get_info

    for spec, _, row in _miles_inputs(miles_n):
        wave = spec.spectral_axis
        f0 = spec.flux.value
        base = velocity.measure(spec, barycentric=False)["rv"].value
        level = float(np.nanmedian(f0))
        for snr in (30.0, 100.0):
            sig = np.full(f0.size, level / snr)

            def make(i, with_err, sig=sig, f0=f0, wave=wave, spec=spec):
                noisy = f0 + np.random.default_rng(700 + i).normal(size=f0.size) * sig
                info = get_info(spec).copy()
                return Spectrum(flux=noisy * spec.flux.unit, spectral_axis=wave,
                                uncertainty=StdDevUncertainty(sig) if with_err else None, meta={META_KEY: info})

            print(f"MILES {str(row['mk']):10s} + S/N {snr:4.0f} | {cell(make, base)}", flush=True)
    print(f"(load average {os.getloadavg()[0]:.2f})")


def bias_parts(model, n, r=2000.0):
    """The user path's bias at ``r`` by S/N over ``n`` realisations, and what each template contributes."""
    import collections

    lo, hi = 3850.0, 7300.0
    pix = np.arange(lo, hi, lo / (r * 2.5))
    resp = 1.0 + 0.3 * np.sin((pix - lo) / (hi - lo) * 2.5)
    velocities = np.random.default_rng(7).uniform(-900, 900, n)
    resel = C_KMS / r

    def spectrum(v, snr, i, errors):
        flux = model(r)(np.log(pix) - np.log(velocity.doppler_factor(v * KMS)))
        sig = np.sqrt(np.clip(flux, 1e-3, None)) / snr if snr else None
        obs = (flux + np.random.default_rng(100 + i).normal(size=flux.size) * sig if snr else flux) * resp
        info = ObsInfo(object="sun", medium="vacuum", medium_assumed=False, resolving_power=r)
        return Spectrum(flux=obs * u.dimensionless_unscaled, spectral_axis=pix * u.AA,
                        uncertainty=StdDevUncertainty(sig * resp) if snr and errors(i) else None, meta={META_KEY: info})

    print(f"\n== the user path's bias at R {r:.0f} by S/N, {n} realisations a cell (Kurucz Sun x response; "
          f"load average {os.getloadavg()[0]:.2f}) ==")
    for template, modes in ((None, {"error arrays on every other": lambda i: i % 2 == 0}),
                            ("library:G8 V", {"error arrays": lambda i: True, "no error arrays": lambda i: False})):
        for mode, errors in modes.items():
            # noiseless: no error array (one would state noise the flux has not), measured once a template
            for snr in (10.0, 30.0, 100.0) + ((None,) if mode != "error arrays" else ()):
                dv, parts = [], collections.defaultdict(list)
                for i, v in enumerate(velocities):
                    res = velocity.measure(spectrum(v, snr, i, errors), template=template, barycentric=False)
                    d = res["rv"].value - v
                    dv.append(d)
                    for m in res["templates"]:
                        parts[m["name"]].append((m["weight"], d + m["rv_offset"].value))
                dv = np.asarray(dv)
                label = f"{template or 'no template'}, {mode}, S/N {snr:.0f}" if snr else f"{template or 'no template'}, noiseless"
                print(f"{label:52s} bias {dv.mean():+6.3f} +- {dv.std(ddof=1) / np.sqrt(n):5.3f} km/s "
                      f"({100 * dv.mean() / resel:+5.2f}% resel), scatter {dv.std(ddof=1):6.3f}")
                if template is None:
                    for name, rows in sorted(parts.items(), key=lambda kv: -sum(w for w, _ in kv[1])):
                        w, d = np.array(rows).T
                        if w.sum() / n >= 0.01:
                            print(f"    {name:30s} mean weight {w.sum() / n:5.3f}  its own bias {d.mean():+6.3f}  "
                                  f"share of the bias {np.sum(w * d) / n:+6.3f}")


def pull_parts(n, r=2000.0, snr=100.0):
    """Per off-grid type: mean offset, scatter about it, the error budget's parts and the pulls."""
    from specan import synth

    print(f"\n== off-grid synthetic types one at a time, R {r:.0f}, S/N {snr:.0f}, {n} velocities a type "
          f"(load average {os.getloadavg()[0]:.2f}) ==")
    for linear in (False, True):
        print("linear pixels 2.5-4.7 per FWHM" if linear else "2.5 pixels per FWHM")
        pulls = []
        for st, lc in OTHER_TYPES:
            rng = np.random.default_rng(5)
            rows = []
            for i in range(n):
                v = rng.uniform(-900, 900)
                place = ({"wave": np.arange(3850.0, 7300.0, 3850.0 / (r * 2.5)) * u.AA} if linear
                         else {"wave_range": (3850, 7300) * u.AA})
                s = synth.spectrum(st, lc, resolving_power=r, rv=v * KMS, snr=snr, seed=700 + i, **place)
                res = velocity.measure(s, barycentric=False)
                rows.append((res["rv"].value - v, res["rv_err"].value, res["rv_err_noise"].value,
                             res["rv_err_mismatch"].value, res["rv_err_choice"].value))
            a = np.array(rows)
            p = a[:, 0] / a[:, 1]
            pulls += list(p)
            print(f"  {st + ' ' + lc:8s} offset {a[:, 0].mean():+6.3f} +- {a[:, 0].std(ddof=1) / np.sqrt(n):5.3f} scatter "
                  f"{a[:, 0].std(ddof=1):5.3f} | rv_err {a[:, 1].mean():5.3f}: noise {a[:, 2].mean():5.3f} mismatch "
                  f"{a[:, 3].mean():5.3f} choice {a[:, 4].mean():5.3f} | pulls: sd {np.std(p, ddof=1):4.2f}, rms {np.sqrt(np.mean(p ** 2)):4.2f}")
        print(f"  all types: pull sd {np.std(pulls, ddof=1):.2f}, rms {np.sqrt(np.mean(np.square(pulls))):.2f}")


if __name__ == "__main__":
    quick = "--quick" in sys.argv
    print(f"OPENBLAS_NUM_THREADS={os.environ.get('OPENBLAS_NUM_THREADS', 'unset')}")
    model = kurucz()
    n = 10 if quick else 30
    chosen = [a for a in sys.argv[1:] if a.startswith("--") and a != "--quick"]
    if not chosen:
        for snr in (30, 100):
            compare(model, n, snr)
        crb_table(model, 10 if quick else 40)
        auto_speed()
    if "--speed" in chosen or not chosen:
        speed(model, 10 if quick else 40)
    if "--floor" in chosen:
        floor(model, 10 if quick else 40)
    if "--night-set" in chosen:
        night_set(10 if quick else 40)
    if "--user" in chosen:
        user_path(model, 8 if quick else 20)
    if "--other-types" in chosen:
        other_types(6 if quick else 18)
        other_types(6 if quick else 18, linear=True)
    if "--neighbours" in chosen:
        neighbours(model, 10 if quick else 40)
    if "--miles" in chosen:
        miles_stars(20 if quick else 60)
    if "--kurucz" in chosen:
        kurucz_rows(model)
    if "--noise" in chosen:
        noise_pulls(model, 8 if quick else 16)
    if "--bias-parts" in chosen:
        bias_parts(model, 60 if quick else 400)
    if "--pull-parts" in chosen:
        pull_parts(6 if quick else 12)
    if "--against" in chosen:
        against(model, 10 if quick else 40, sys.argv[sys.argv.index("--against") + 1])

"""Benchmark: S/N and equivalent-width errors of spectra without an error array.

For the Kurucz solar model (rms-solar, R 2000) and synthetic A2 V and K2 V stars
(``specan.synth``) at R 1,000-20,000 with injected noise, prints

- the S/N ``specan.prepare.snr`` finds without the error array (the flux-based estimate,
  :func:`specan.noise.flux_noise`) beside the injected value and DER_SNR (Stoehr et al.
  2008, via specutils), the estimate used before;
- the median ratio of the equivalent-width errors measured without and with the true
  error array, over the lines detected both ways (target: within 1.3);
- the time of one flux-based estimate.

Run: ``python benchmarks/bench_noise.py``. Measured before the flux-based estimate
(DER_SNR): EW-error ratios 1.94 / 3.99 on the Sun at S/N 30 / 100 and 1.08-1.66 on the
synthetic stars; DER_SNR S/N 43 for an injected 300 on the Sun.
"""

import sys
import time
from pathlib import Path

import astropy.units as u
import numpy as np
from astropy.nddata import StdDevUncertainty
from specutils import Spectrum
from specutils.analysis import snr_derived

from specan import lines, synth
from specan.noise import flux_noise, pixels_per_fwhm
from specan.obsinfo import ObsInfo
from specan.prepare import snr


def _spectrum(w, f, err, resolving_power, medium):
    info = ObsInfo(medium=medium, medium_assumed=False, resolving_power=resolving_power)
    unc = None if err is None else StdDevUncertainty(err)
    return Spectrum(spectral_axis=w * u.AA, flux=f * u.dimensionless_unscaled, uncertainty=unc,
                    meta={"specan": info})


def _kurucz():
    import solar

    data = np.loadtxt(Path(solar.__file__).parent / "data_files" / "kurucz-fsunallp.2000resam125.txt")
    w, f = data[:, 0] * 10.0, data[:, 1]
    keep = (w > 3700) & (w < 8800)
    return w[keep], f[keep]


def cases(rng):
    """(name, wave, noisy flux, true error, R, medium, injected S/N) of every case."""
    w, f = _kurucz()
    for s in (10, 30, 100, 300):
        sig = np.full(f.size, np.median(f) / s)
        yield f"Kurucz Sun R2000 S/N{s}", w, f + rng.normal(size=f.size) * sig, sig, 2000.0, "vacuum", s
    for t in ("A2", "K2"):
        for r in (1000, 2000, 5000, 20000):
            for s in (10, 30, 100, 300):
                sp = synth.spectrum(t, "V", resolving_power=r, snr=s, seed=s, wave_range=(3800, 6800) * u.AA,
                                    continuum="blackbody")
                yield (f"{t} V R{r} S/N{s}", sp.spectral_axis.to_value(u.AA), sp.flux.value, sp.uncertainty.array,
                       float(r), "air", s)


def ew_error_ratio(w, f, err, r, medium):
    a = lines.measure(_spectrum(w, f, err, r, medium))
    b = lines.measure(_spectrum(w, f, None, r, medium))
    both = np.asarray(a["detected"]) & np.asarray(b["detected"])
    return float(np.median(b["ew_err"][both] / a["ew_err"][both])), int(both.sum())


def user_path():
    """The S/N and the lines stage's noise as a user gets them: through prepare, telluric bands masked.

    The Kurucz Sun over 3700-8800 A (noise sigma = f / S/N, no error array): prepare's S/N, and the
    median 1 / sigma of the lines stage's noise (``resolution.normalised_arrays`` of the prepared
    spectrum) with its method. Measured before the telluric pixels entered the noise estimate:
    S/N 33, 108, 39, 39, 39 for 30, 100, 300, 1000 and the noiseless model (DER_SNR from 300 on).
    """
    from specan.prepare import prepare
    from specan.resolution import normalised_arrays

    w, f = _kurucz()
    print(f"{'through prepare':26s} {'S/N in':>6s} {'S/N':>6s} {'lines':>6s}  method")
    for s_in in (30, 100, 300, 1000, None):
        noise = np.random.default_rng(0).normal(0.0, 1.0, f.size) * f / s_in if s_in else 0.0
        p = prepare(_spectrum(w, f + noise, None, 2000.0, "vacuum"))
        info = p.meta["specan"]
        arrays = normalised_arrays(p)
        level = float(np.median(1.0 / arrays.sigma[arrays.good]))
        got = "None" if info.snr is None else f"{info.snr:6.0f}"
        print(f"{'Kurucz Sun 3700-8800 A':26s} {str(s_in or '-'):>6s} {got:>6s} {level:6.0f}  "
              f"{'DER_SNR' if 'DER_SNR' in arrays.noise_source else 'plateau'}")


def main():
    rng = np.random.default_rng(13)
    print(f"{'case':26s} {'S/N in':>6s} {'flux':>6s} {'ratio':>6s} {'DER_SNR':>7s}  EW-err ratio (n)")
    worst_snr, worst_ew = 0.0, 0.0
    for name, w, f, err, r, medium, s_in in cases(rng):
        got = snr(_spectrum(w, f, None, r, medium))["snr"]
        der = float(snr_derived(_spectrum(w, f, None, r, medium)).value)
        worst_snr = max(worst_snr, abs(got / s_in - 1))
        line = f"{name:26s} {s_in:6d} {got:6.0f} {got / s_in:6.2f} {der:7.0f}"
        if s_in in (30, 100):
            ratio, n = ew_error_ratio(w, f, err, r, medium)
            worst_ew = max(worst_ew, max(ratio, 1 / ratio))
            line += f"  {ratio:.2f} ({n})"
        print(line)
    print(f"largest |S/N ratio - 1|: {worst_snr:.2f} (target 0.20); largest EW-error ratio (or inverse): "
          f"{worst_ew:.2f} (target 1.3)")
    user_path()
    w, f = _kurucz()
    ppf = pixels_per_fwhm(w, 2000.0)
    n = int(sys.argv[1]) if len(sys.argv) > 1 else 20
    t0 = time.perf_counter()
    for _ in range(n):
        flux_noise(f, None, ppf)
    print(f"flux_noise on {f.size} pixels: {1000 * (time.perf_counter() - t0) / n:.1f} ms")


if __name__ == "__main__":
    main()

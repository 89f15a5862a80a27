"""The type evidence of the library stars whose whole spectra look most like the star's.

Every usable MILES star with a full MK type (Sanchez-Blazquez et al. 2006; Falcon-Barroso et
al. 2011; the default calibration's selection, ``scripts/fit_default_calibration.py``) is
shipped at rest, smoothed to :data:`FWHM` and continuum-normalised by :func:`specan.prepare.prepare`
on :func:`wavelengths` (``specan/data/neighbours_miles.fits``, written by
``scripts/build_neighbour_set.py``). A star is brought to the same footing, and compared with
every library star at once: the mean squared difference after the best multiplicative
polynomial of degree :data:`POLY_DEGREE` (what continuum and instrument response leave).

The :data:`NEIGHBOURS` nearest stars then give a likelihood of the type code: a Gaussian of
:data:`CODE_SIGMA` subclasses at each neighbour's published type, weighted by
``exp(-(d / d_best - 1) / WIDTH)`` (relative to the best match, so a noisy spectrum, whose
distances are all inflated alike, spreads its weight over more stars by itself).
:meth:`specan.classify.Calibration.classify_criteria` multiplies its criteria posterior by it.
Only the type: in cross-validation the neighbours' classes made the JHC (1984) stars' luminosity
groups worse (57.9% of B-K stars from the neighbours alone, 64.5-65.8% multiplied into the
criteria's at the settings best on MILES, against 68.4% from the criteria alone; measured), so the
class stays the criteria's (and the surface gravity's). ``benchmarks/cv_classify.py`` prints the
figures (``+n``).

Settings (polynomial degree, neighbours, width, code sigma) were chosen by leave-one-out on
the MILES stars only, the JHC stars kept as the outside check; see the benchmark.
"""

from __future__ import annotations

import functools
from importlib import resources
from pathlib import Path
from typing import NamedTuple

import numpy as np

from ..contents import content_key, forgettable, kept
from ..errors import AnalysisError
from ..obsinfo import get_info
from ..resolution import on_rest_grid
from ..threads import in_one_thread, single_threaded

__all__ = ["REFERENCE_FILE", "FWHM", "POLY_DEGREE", "NEIGHBOURS", "WIDTH", "CODE_SIGMA", "SHOWN",
           "wavelengths", "ReferenceSet", "default_reference", "on_grid", "mean_square_differences",
           "Evidence", "compare", "measure"]

REFERENCE_FILE = "neighbours_miles.fits"
#: Comparison resolution (FWHM, Angstrom): the default calibration's, which the JHC copies have.
FWHM = 13.0
#: Comparison pixels: air wavelengths, about 3 per FWHM, where both libraries have flux.
WAVE_RANGE = (3650.0, 7350.0)
STEP = 4.0
#: Multiplicative polynomial (Legendre, over the whole grid): degree 1 did as well as 3 or 5 on
#: the MILES stars (leave-one-out, measured) and costs least.
POLY_DEGREE = 1
#: Nearest stars that vote, the width of their weights and of each one's Gaussian in type code
#: (subclasses): chosen by leave-one-out on MILES (see the module docstring).
NEIGHBOURS = 20
WIDTH = 1.0
CODE_SIGMA = 1.5
#: Neighbours named in a result.
SHOWN = 5
#: Least comparison pixels for the evidence to be used (a quarter of the grid, our choice).
MIN_PIXELS = 230
#: Floor of the normalised likelihood (per lattice point, times the lattice size): a star unlike
#: every library star leaves the criteria to decide rather than vetoing a type outright.
FLOOR = 1e-3


def wavelengths():
    """Air wavelengths (Angstrom) of the comparison pixels."""
    return np.arange(WAVE_RANGE[0], WAVE_RANGE[1] + STEP / 2, STEP)


class ReferenceSet(NamedTuple):
    """The library stars on the comparison pixels."""

    flux: np.ndarray       # (n_stars, n_pixels), normalised; 0 where not usable
    good: np.ndarray       # (n_stars, n_pixels) bool
    ids: list              # "miles:m0001"
    names: list            # as the library lists them
    codes: np.ndarray      # published type codes (specan.mktypes)
    mk: list               # published MK types as the default calibration reads them
    source: str
    flux_sq: np.ndarray    # flux ** 2 and good as floats, kept for the comparison's matrix products
    good_f: np.ndarray

    @classmethod
    def load(cls, path=None):
        """Read a set written by ``scripts/build_neighbour_set.py`` (default: the packaged one)."""
        from astropy.io import fits

        if path is None:
            try:
                with resources.as_file(resources.files("specan.data") / REFERENCE_FILE) as p:
                    return cls.load(p)
            except FileNotFoundError:
                raise AnalysisError(f"library comparison set {REFERENCE_FILE} missing from specan/data: "
                                    "regenerate it with scripts/build_neighbour_set.py") from None
        with fits.open(Path(path)) as hdus:
            h = hdus[0].header
            if abs(h["FWHM"] - FWHM) > 1e-6 or abs(h["CDELT1"] - STEP) > 1e-9 or abs(h["CRVAL1"] - WAVE_RANGE[0]) > 1e-9:
                raise AnalysisError(f"library comparison set {path} was made for other pixels or resolution")
            flux = np.asarray(hdus[0].data, float)
            stars = hdus["STARS"].data
            source = "".join(str(h[k]) for k in h if k.startswith("CITE"))
            return cls.from_arrays(flux, [str(s) for s in stars["id"]], [str(s) for s in stars["name"]],
                                   np.asarray(stars["code"], float), [str(s) for s in stars["mk"]], source)

    @classmethod
    def from_arrays(cls, flux, ids, names, codes, mk, source=""):
        """A set from normalised fluxes on :func:`wavelengths` (NaN where unusable) and the stars' labels."""
        flux = np.asarray(flux, float)
        good = np.isfinite(flux)
        flux = np.where(good, flux, 0.0)
        return cls(flux, good, list(ids), list(names), np.asarray(codes, float), list(mk), source,
                   flux * flux, good.astype(float))


@functools.lru_cache(maxsize=1)
def default_reference():
    """The packaged :class:`ReferenceSet` (cached)."""
    return ReferenceSet.load()


def on_grid(spectrum, rv=None, fwhm_in=None, resolving_power=None, notes=None, telluric=True, pixels=None):
    """A spectrum at rest, smoothed to :data:`FWHM`, normalised by specan's ``prepare``, on :func:`wavelengths`.

    Parameters
    ----------
    spectrum : specutils.Spectrum
        As read (normalised or not; air or vacuum).
    rv : astropy.units.Quantity, optional
        Velocity seen in the data (removed); None: taken as at rest.
    fwhm_in : float or ndarray, optional
        The spectrum's FWHM (Angstrom); default lambda / R (``resolving_power``, else the
        metadata's), else 2.5 pixels.
    resolving_power : float, optional
        R when the metadata give none.
    notes : list, optional
        Receives a sentence per assumption.
    telluric : bool
        Mask the telluric bands (:func:`specan.prepare.prepare`).
    pixels : specan.resolution.RestPixels, optional
        ``rest_pixels(spectrum, rv)`` when the caller has made it already.

    Returns
    -------
    flux, good : numpy.ndarray
        Normalised flux and usable pixels on :func:`wavelengths`.
    """
    from ..prepare import normalise_arrays

    notes = notes if notes is not None else []
    grid = wavelengths()
    rest = on_rest_grid(spectrum, grid, FWHM, rv=rv, fwhm_in=fwhm_in, resolving_power=resolving_power,
                        positive=True, what="the library comparison's 3650-7350 A", pixels=pixels)
    if float(np.median(np.broadcast_to(rest.fwhm_in, rest.wave.shape))) > FWHM * 1.1:
        notes.append(f"spectrum broader than the library comparison's {FWHM:g} A FWHM: its neighbours are less "
                     "alike than they look")
    on = rest.flux
    ok = rest.ok & (on > 0)
    if ok.sum() < 20:
        raise AnalysisError("too few usable pixels on the library comparison's wavelengths", get_info(spectrum).path)
    # prepare()'s normalisation without its S/N and Spectrum objects: the same flux to the bit
    # (tests/test_classify_neighbours.py), as the shipped library stars were normalised
    out, bad = normalise_arrays(grid, np.where(ok, on, 1.0), ~ok, telluric=telluric)
    good = ok & np.isfinite(out) & ~bad
    return np.where(good, out, 0.0), good


@functools.lru_cache(maxsize=1)   # the same for every star: made once (read only)
def _basis():
    """Legendre basis on the comparison pixels, and its columns' pairwise products (n, K*K)."""
    P = np.polynomial.legendre.legvander(np.linspace(-1.0, 1.0, wavelengths().size), POLY_DEGREE)
    K = P.shape[1]
    PP = (P[:, :, None] * P[:, None, :]).reshape(-1, K * K)
    P.flags.writeable = PP.flags.writeable = False
    return P, PP


#: Every library star's normal matrix and pixel count summed over all the comparison pixels, for the
#: last reference set seen (set-up work: the same for every star compared).
_ALL_PIXELS = forgettable({})


def _pixel_terms(good, reference):
    """Every library star's normal matrix (n_stars, K, K) and the pixels compared, over the ``good`` pixels.

    The sums over all pixels depend on the reference set only: kept, and a star's unusable pixels
    (the grid's ends beyond its coverage, which move with its velocity; masked pixels) are taken
    off them, or, where most are unusable, its usable pixels summed afresh. Either way the stars'
    squared fluxes (a third of the set's memory) are not read whole again; taking off changes the
    sums in rounding only (tests/test_classify.py: the per-star fits).
    """
    _, PP = _basis()
    K = int(round(np.sqrt(PP.shape[1])))
    hit = _ALL_PIXELS.get(id(reference))
    if hit is None or hit[0] is not reference:
        with single_threaded():   # the same bits whoever builds them (specan.threads)
            hit = (reference, reference.flux_sq @ PP, reference.good_f.sum(axis=1), {})
        _ALL_PIXELS.clear()
        _ALL_PIXELS[id(reference)] = hit

    def make():
        bad = np.flatnonzero(~good)
        if bad.size == 0:
            G, n = hit[1], hit[2]
        elif bad.size <= good.size // 2:
            G = hit[1] - reference.flux_sq[:, bad] @ PP[bad]
            n = hit[2] - reference.good_f[:, bad].sum(axis=1)
        else:
            use = np.flatnonzero(good)
            G = reference.flux_sq[:, use] @ PP[use]
            n = reference.good_f[:, use].sum(axis=1)
        return G.reshape(-1, K, K), n

    # they depend on the set and the star's pixel mask only, and a night's spectra of one set-up share a
    # few masks (the telluric bands and the grid's ends, moved by the velocity): kept for the last few
    # masks of this set (59 kB each, with its sums above), made with one thread (their products differ in
    # the last bits with two: tests/test_parameters.py)
    # (specan.threads keeps its controller of the libraries: 12 us a call, against 1.1 ms for a new one, measured)
    return kept(hit[3], content_key(good), in_one_thread(make), MASKS_KEPT)


#: How many pixel masks' normal matrices :func:`_pixel_terms` keeps per reference set.
MASKS_KEPT = 16


def mean_square_differences(flux, good, reference):
    """Mean squared difference between a star and every library star, after the best polynomial.

    For each library star s the model is ``P c_s * R_s`` (P: Legendre basis of degree
    :data:`POLY_DEGREE`) over the pixels both have. All the normal equations come from matrix
    products over the pixels (the (P_k P_l) outer products weighted by R_s^2), then one batched
    solve: no loop over the stars (459 stars x 926 pixels: 0.6 ms, measured). The normal
    matrices do not depend on the star's flux: their sums over all pixels are kept, less the star's
    unusable pixels (:func:`_pixel_terms`); the star's own flux costs two products.

    Returns
    -------
    msd, n : numpy.ndarray
        Mean squared residual per library star and the number of pixels compared.
    """
    P, _ = _basis()
    good = np.asarray(good, bool)
    w = good.astype(float)
    y = np.where(good, flux, 0.0)
    G, n = _pixel_terms(good, reference)
    b = reference.flux @ (P * (w * y)[:, None])
    yy = reference.good_f @ (w * y * y)
    c = np.linalg.solve(G + 1e-9 * np.eye(G.shape[-1]), b[..., None])[..., 0]
    chi2 = np.clip(yy - np.einsum("sk,sk->s", b, c), 0.0, None)
    return chi2 / np.maximum(n, 1.0), n


class Evidence(NamedTuple):
    """The library comparison of one star."""

    msd: np.ndarray        # mean squared difference to each library star (inf where excluded)
    pixels: int            # comparison pixels of the star
    reference: ReferenceSet

    def nearest(self, k=NEIGHBOURS):
        """Indices of the ``k`` nearest library stars, nearest first."""
        return np.argsort(self.msd, kind="stable")[:k]

    def weights(self, k=NEIGHBOURS):
        """(indices, weights) of the voting stars (see the module docstring)."""
        idx = self.nearest(k)
        d = self.msd[idx]
        best = max(d[0], 1e-12)
        return idx, np.exp(-(d / best - 1.0) / WIDTH)

    def type_likelihood(self, grid):
        """The neighbours' likelihood of each type code in ``grid`` (normalised, floored; see :data:`FLOOR`)."""
        idx, w = self.weights()
        grid = np.asarray(grid, float)
        lk = np.exp(-0.5 * ((grid[:, None] - self.reference.codes[idx][None, :]) / CODE_SIGMA) ** 2) @ w
        lk = lk / lk.sum()
        return lk + FLOOR / grid.size

    def named(self, k=SHOWN):
        """The ``k`` nearest stars: list of {id, name, mk, rms (normalised flux), weight}."""
        idx, w = self.weights()
        ref = self.reference
        return [{"id": ref.ids[i], "name": ref.names[i], "mk": ref.mk[i], "rms": float(np.sqrt(self.msd[i])),
                 "weight": float(wi / w.sum())} for i, wi in zip(idx[:k], w[:k])]


def compare(flux, good, reference=None, exclude=()):
    """:class:`Evidence` of a star already on the comparison pixels.

    ``exclude``: library ids (or names) left out (e.g. the star itself in a cross-validation).
    """
    reference = reference or default_reference()
    good = np.asarray(good, bool)
    if good.sum() < MIN_PIXELS:
        raise AnalysisError(f"only {int(good.sum())} pixels to compare with the library (at least {MIN_PIXELS})")
    msd, n = mean_square_differences(flux, good, reference)
    msd = np.where(n >= MIN_PIXELS, msd, np.inf)
    if exclude:
        out = set(exclude)
        msd = np.where([i in out or nm in out for i, nm in zip(reference.ids, reference.names)], np.inf, msd)
    return Evidence(msd, int(good.sum()), reference)


def measure(spectrum, rv=None, fwhm_in=None, resolving_power=None, notes=None, reference=None, pixels=None):
    """:class:`Evidence` of a spectrum (see :func:`on_grid` for the arguments)."""
    flux, good = on_grid(spectrum, rv=rv, fwhm_in=fwhm_in, resolving_power=resolving_power, notes=notes,
                         pixels=pixels)
    return compare(flux, good, reference)

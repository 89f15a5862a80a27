"""Which template, at which resolving power.

The template is a user spectrum (a file or a Spectrum, e.g. an RV standard), a reference
exposure of the same star (the velocity is then relative to it), one built-in template, or the
automatic choice. The automatic choice (:func:`automatic_mixture`) scores, in one batch
(:mod:`.bank`), the empirical library templates (:func:`specan.templates.library_templates`,
where the library covers at least :data:`LIBRARY_MIN_COVER` of the spectrum's weight) and the
synthetic grid, then the synthetic grid's neighbours of its best type (where they can enter the
mixture, :data:`NEIGHBOUR_GAIN`); the templates whose
peaks come close to the best are kept with weights (:func:`~.bank.mixture_weights`) and the
velocity is their weighted mean. When the spectrum's resolving power is unknown and the
narrowest lines do not tell it, the width of a synthetic template of the best type is scanned
first. Candidates are :class:`~.prepared.BuiltinCandidate` lists.
"""

from __future__ import annotations

import functools
from pathlib import Path
from typing import NamedTuple

import astropy.units as u
import numpy as np

from .. import resolution, templates
from ..errors import AnalysisError, SpecanError
from ..mktypes import code_to_sptype, parse_mk, sptype_to_code
from ..obsinfo import get_info, vacuum_to_air
from .bank import mixture_threshold, mixture_weights, score_bank, short_side, template_bank
from .correlation import best_index, fwhm_pixels, template_peaks
from .prepared import BuiltinCandidate, PreparedTemplate, prepare_builtin, spectrum_template

__all__ = ["R_SCAN", "LIBRARY_MIN_COVER", "NEIGHBOUR_GAIN", "ResolvingPower", "TemplateRequest", "TemplateChoice",
           "settle_resolving_power", "seen_resolving_power", "BROADER_THAN_STATED", "SEEN_SOURCE", "parse_template", "choose_template", "user_template", "reference_template",
           "automatic_type", "automatic_mixture", "MixtureMember", "library_cover", "neighbour_types", "scan_resolving_power"]

# Multipliers of the first guess tried when the resolving power is unknown (sampling of 1.7-5
# pixels per FWHM, the range of real spectrographs; common practice).
R_SCAN = (0.5, 0.6, 0.7, 0.85, 1.0, 1.2, 1.45)
#: Most a neighbouring synthetic type (:func:`neighbour_types`) may correlate above the best type of
#: the grid (our choice: twice the most seen, 0.049 on the 272 spectra of benchmarks/bench_velocity.py
#: --neighbours): below the mixture's threshold by more, the best type's neighbours are not tried.
NEIGHBOUR_GAIN = 0.1
#: Smallest share of the spectrum's correlation weight inside the library's wavelength range for
#: the automatic choice to use library templates (our choice: a template must see most of the star).
LIBRARY_MIN_COVER = 0.5


# ---------------------------------------------------------------------------
# Resolving power
# ---------------------------------------------------------------------------
class ResolvingPower(NamedTuple):
    """The spectrum's resolving power, whether it is known (else a guess to scan) and whence."""

    value: float
    known: bool
    source: str

    @property
    def template_key(self):
        """The value built-in templates are made at (3 significant figures: shared between spectra)."""
        return float(f"{self.value:.3g}")


def _sampling_guess(observed):
    """(R, known): the stated resolving power, or a first guess from the sampling (2.5 pixels/FWHM)."""
    if observed.info.resolving_power:
        return float(observed.info.resolving_power), True
    med = float(np.median(np.diff(observed.spline_x)))
    return 1.0 / (2.5 * med), False


def settle_resolving_power(observed, spectrum, notes):
    """:class:`ResolvingPower` of the spectrum: stated, else from its narrowest lines, else a guess.

    A guess (``known`` False) is settled later by the template-width scan.
    """
    res_r, r_known = _sampling_guess(observed)
    if r_known:
        return ResolvingPower(res_r, True, "file")
    # The widths of the narrowest lines tell R better than the template-width scan below,
    # which prefers broad templates on real spectra (Kurucz Sun at R = 2000: 1360 by the
    # scan, 1847 by the lines; velocity scatter 1.9 against 1.1 km/s at S/N 100, measured).
    r_est = resolution.estimate_resolving_power(spectrum)
    if r_est is None:
        return ResolvingPower(res_r, False, "template-width scan")
    notes.append(f"resolving power unknown: R ~ {float(r_est):.0f} estimated from the narrowest lines "
                 "(use --resolving-power to set it)")
    return ResolvingPower(float(r_est), True, "narrowest lines")


#: How much sharper than the resolution the correlation shows (:func:`seen_resolving_power`) the
#: stated R must be before the velocity is measured again at the one shown (our choice: on 128
#: spectra whose stated R is right -- the Kurucz Sun and off-grid synthetic stars at R 1,000-5,000, 30
#: MILES stars, the 20 of benchmarks/bench_pipeline.py and the demo night -- the stated R was at most
#: 1.18 times the one shown but for the demo night's double-lined binary trf3_14 (1.57; a second star is
#: no broadening, and the velocity stage keeps the stated R there), measured; the Kurucz Sun (R ~2,000)
#: stated R 5,000 shows ~2,300).
BROADER_THAN_STATED = 1.25
#: ``resolving_power_source`` when the velocity was measured at the resolution the correlation shows.
SEEN_SOURCE = "correlation width (stated R finer)"


def seen_resolving_power(choice, about, observed):
    """Resolving power the data show against the best built-in template, or None.

    The CCF about the peak against the template's own correlation seen through the same window and
    filter (``about.model``): with Gaussian profiles the CCF's width squared is the data's plus the
    template's, the model's twice the template's, so the data's FWHM is the template's times
    sqrt(2 q^2 - 1), q the ratio of the two widths (common practice: Gaussian widths add in
    quadrature). The template's resolution is the stated R for synthetic templates and no finer than
    the library's own line width (``templates.library_fwhm``, at the data's middle wavelength). None
    for user templates and where a width cannot be read.
    """
    member = choice.mixture[0]
    if member.candidate is None or about.model is None or not np.isfinite(about.fwhm_px):
        return None
    q = about.fwhm_px / fwhm_pixels(about.j, about.model, 1.0)
    x = 2.0 * q * q - 1.0
    if not (np.isfinite(x) and x > 0):
        return None
    r_template = choice.power.value
    if member.candidate.kind == "library":
        # the middle valid grid point (a median's sort cost 20 us a spectrum, for a 0.1% better R)
        idx = np.flatnonzero(observed.valid)
        middle = float(np.exp(observed.grid[idx[idx.size // 2]])) if idx.size else float(np.exp(np.median(observed.grid)))
        r_template = min(r_template, middle / templates.library_fwhm())
    return r_template / float(np.sqrt(x))


# ---------------------------------------------------------------------------
# What the caller asked for
# ---------------------------------------------------------------------------
class TemplateRequest(NamedTuple):
    """``kind`` ('auto' | 'library' | 'synth' | 'mask' | 'spectrum' | 'file'), MK type or library
    template name if given, and the object."""

    kind: str
    sptype: str | None
    lumclass: str | None
    obj: object


def parse_template(template):
    """The :class:`TemplateRequest` of ``measure``'s ``template`` argument."""
    from specutils import Spectrum

    if template is None or (isinstance(template, str) and template.strip().lower() in ("", "auto")):
        return TemplateRequest("auto", None, None, None)
    if isinstance(template, Spectrum):
        return TemplateRequest("spectrum", None, None, template)
    if isinstance(template, Path) or (isinstance(template, str) and Path(template).is_file()):
        return TemplateRequest("file", None, None, Path(template))
    text = str(template).strip()
    kind = "synth"
    low = text.lower()
    if low.startswith("mask"):
        kind, text = "mask", text[4:].lstrip(":").strip()
    elif low.startswith("synth"):
        text = text[5:].lstrip(":").strip()
    elif low.startswith("library"):
        kind, text = "library", text[7:].lstrip(":").strip()
        if not text:
            return TemplateRequest("auto", None, None, None)
        names = [t.name for t in templates.library_templates()]
        if text not in names:
            raise SpecanError(f"no library template {text!r}; choose from: {', '.join(names)}")
        return TemplateRequest("library", None, None, text)
    if not text:
        return TemplateRequest(kind, None, None, None)
    try:
        parse_mk(text)
    except ValueError:
        raise SpecanError(f"template {template!r} is neither a file nor an MK type (use e.g. 'G2 V', "
                          "'mask:K0 III', 'auto' or a path)") from None
    parts = text.split()
    return TemplateRequest(kind, parts[0], (parts[1] if len(parts) > 1 else "V"), None)


# ---------------------------------------------------------------------------
# The choice
# ---------------------------------------------------------------------------
class MixtureMember(NamedTuple):
    """One template of the velocity: prepared template, weight, integer peak lag (None: to be
    found), the candidate it was made from (None for user templates), its score and, from the
    scoring, a fractional lag the refinement may start from (None: none)."""

    template: PreparedTemplate
    weight: float
    lag: int | None
    candidate: BuiltinCandidate | None
    score: float | None
    start: float | None = None


class TemplateChoice(NamedTuple):
    """The prepared template, the resolving power as finally settled, the scores of the automatic
    choice (template name -> peak height), whether the velocity is relative to a reference, the
    built-in template's MK type and kind (None for user templates), and the templates whose
    velocities are averaged (:class:`MixtureMember`, the best first; one for a chosen template)."""

    template: PreparedTemplate
    power: ResolvingPower
    scores: dict
    relative: bool
    mk: str | None = None
    kind: str | None = None
    mixture: tuple = ()


def choose_template(request, search, power, *, reference=None, template_rv=0 * u.km / u.s, template_grid=None,
                    clip_emission=True, notes, where=None, data_short=None, exclude=()):
    """The :class:`TemplateChoice` for a :class:`TemplateRequest` (a ``reference`` exposure wins).

    ``search`` is the spectrum's :class:`~.correlation.PeakSearch`, ``power`` its
    :class:`ResolvingPower`; ``where`` names the spectrum in errors; ``data_short`` the data
    arrays' FFTs at the template bank's length; ``exclude`` names library templates not to use.
    """
    grid = search.lags.template_grid
    target_r = power.value if power.known else None
    if reference is not None:
        chosen = reference_template(reference, grid, target_r, clip_emission, notes)
        return TemplateChoice(chosen, power, {}, True, mixture=(MixtureMember(chosen, 1.0, None, None, None),))
    if request.kind in ("spectrum", "file"):
        chosen = user_template(request, u.Quantity(template_rv, u.km / u.s).value, grid, target_r, clip_emission,
                               notes)
        return TemplateChoice(chosen, power, {}, False, mixture=(MixtureMember(chosen, 1.0, None, None, None),))
    if request.kind == "auto" and not power.known:
        # resolving power unknown: settle it with the synthetic template of the best type, then choose
        (sptype, lumclass), _ = automatic_type(search, power.template_key, template_grid, [], where, data_short)
        synthetic = BuiltinCandidate(sptype, lumclass, power.template_key)
        _, power = scan_resolving_power(search, synthetic, power, prepare_builtin(synthetic, grid), notes)
    if request.kind == "auto":
        members, scores = automatic_mixture(search, power.template_key, template_grid, notes, where, data_short,
                                            exclude)
        best = members[0]
        return TemplateChoice(best.template, power, scores, False, f"{best.candidate.sptype} {best.candidate.lumclass}",
                              best.candidate.kind, tuple(members))
    candidate, scores = builtin_request(request, search, power, template_grid, notes, where, data_short)
    chosen = prepare_builtin(candidate, grid)
    if not power.known:
        # resolving power unknown: the width of a synthetic template of that type that correlates best
        synthetic = candidate._replace(kind="synth" if candidate.kind == "library" else candidate.kind, name=None)
        chosen, power = scan_resolving_power(search, synthetic, power, prepare_builtin(synthetic, grid), notes)
        if candidate.kind == "library":
            chosen = prepare_builtin(candidate._replace(resolving_power=power.template_key), grid)
    return TemplateChoice(chosen, power, scores, False, f"{candidate.sptype} {candidate.lumclass}", candidate.kind,
                          (MixtureMember(chosen, 1.0, None, candidate, None),))


def builtin_request(request, search, power, template_grid, notes, where=None, data_short=None):
    """(:class:`BuiltinCandidate`, scores) of a request for one built-in template or kind."""
    r_key = power.template_key
    if request.kind == "library":
        entry = next(t for t in templates.library_templates() if t.name == request.obj)
        return BuiltinCandidate(entry.sptype, entry.lumclass, r_key, "library", entry.name), {}
    if request.sptype is not None:
        return BuiltinCandidate(request.sptype, request.lumclass, r_key, "mask" if request.kind == "mask" else "synth"), {}
    (sptype, lumclass), scores = automatic_type(search, r_key, template_grid, notes, where, data_short)
    return BuiltinCandidate(sptype, lumclass, r_key, "mask" if request.kind == "mask" else "synth"), scores


_CANDIDATES = {}


def _candidates(resolving_power, library, exclude, grid_types):
    """The automatic choice's candidates: the library templates (``library``; those named in ``exclude``
    left out), then the synthetic ``grid_types``, at ``resolving_power``; kept per request (the same few,
    spectrum after spectrum), with the library's list they were made from (a new list, new candidates)."""
    lib = templates.library_templates() if library else ()
    key = (resolving_power, library, exclude, grid_types)
    found = _CANDIDATES.get(key)
    if found is None or found[0] is not lib:
        left_out = set(exclude)
        made = tuple([BuiltinCandidate(t.sptype, t.lumclass, resolving_power, "library", t.name)
                      for t in lib if t.name not in left_out]
                     + [BuiltinCandidate(st, lc, resolving_power) for st, lc in grid_types])
        found = (lib, made)
        while len(_CANDIDATES) >= 32:   # oldest out first
            _CANDIDATES.pop(next(iter(_CANDIDATES)), None)
        _CANDIDATES[key] = found
    return found[1]


def _scored(search, candidates, data_short):
    """(bank, :class:`~.bank.BankScores`) of ``candidates`` on the spectrum's set-up."""
    bank = template_bank(candidates, search.lags)
    return bank, score_bank(search, bank, data_short if data_short is not None else short_side(search))


def automatic_mixture(search, resolving_power, template_grid, notes, where=None, data_short=None, exclude=()):
    """([:class:`MixtureMember`], scores): the templates whose velocities are averaged, best first.

    Every built-in template is scored in one batch (:func:`~.bank.score_bank`): the library
    templates (observed stars; where they cover at least :data:`LIBRARY_MIN_COVER` of the
    spectrum's weight and unless ``template_grid`` restricts the choice to synthetic types), the
    synthetic grid, then the synthetic neighbours of the best synthetic type (where that type comes
    within :data:`NEIGHBOUR_GAIN` of the least height that enters the mixture: else none of its
    neighbours could enter it, and they are not scored). Templates are
    weighted by how close their peak comes to the best (:func:`~.bank.mixture_weights`): a star
    between two templates gets both, so the velocity moves smoothly from one to the other
    instead of jumping when noise reorders them, and their disagreement enters the error.
    """
    library = False
    if template_grid is None:
        cover = library_cover(search)
        library = cover >= LIBRARY_MIN_COVER
        if not library:
            notes.append(f"library templates cover {cover:.0%} of the spectrum (3545-7405 A): synthetic templates "
                         "used")
    grid_types = tuple(template_grid or templates.automatic_types())
    bank, sc = _scored(search, _candidates(resolving_power, library, tuple(exclude), grid_types), data_short)
    members = list(zip(bank.templates, sc.lag, bank.candidates, sc.height, sc.start))
    syn = [x for x in members if x[2].kind == "synth"]
    best_syn = max(range(len(syn)), key=lambda i: syn[i][3]) if syn else None
    if best_syn is not None and np.isfinite(syn[best_syn][3]):
        c = syn[best_syn][2]
        # the neighbours of the best synthetic type can enter the mixture only if that type comes
        # within NEIGHBOUR_GAIN of the least height that does
        if syn[best_syn][3] + NEIGHBOUR_GAIN < mixture_threshold(sc.height, search.side.ceiling, search.side.height_noise):
            notes.append(f"neighbouring synthetic types not tried: the best synthetic template ({c.sptype} "
                         f"{c.lumclass}) is more than {NEIGHBOUR_GAIN} below the least height that enters the mixture")
            more = []
        else:
            more = [BuiltinCandidate(st, lc, resolving_power)
                    for st, lc in neighbour_types((c.sptype, c.lumclass), grid_types)]
        if more:
            bank2, sc2 = _scored(search, more, data_short)
            members += list(zip(bank2.templates, sc2.lag, bank2.candidates, sc2.height, sc2.start))
    heights = np.array([x[3] for x in members])
    finite = np.isfinite(heights)
    if not finite.any():
        raise AnalysisError("no template correlates with the spectrum", where)
    # (plain floats and flags, not a numpy test per template: ~0.25 ms a spectrum for 49, measured)
    finite = finite.tolist()
    scores = {x[0].name: h for x, h, ok in zip(members, heights.tolist(), finite) if ok}
    index, weights = mixture_weights(heights, search.side.ceiling, search.side.height_noise)
    chosen = [MixtureMember(members[i][0], float(wt), members[i][1], members[i][2], float(members[i][3]),
                            float(members[i][4]))
              for i, wt in zip(index, weights)]
    n_lib = sum(1 for x, ok in zip(members, finite) if ok and x[2].kind == "library")
    kinds = f"{n_lib} library and {len(scores) - n_lib} synthetic" if n_lib else f"{len(scores)} synthetic"
    used = ", ".join(f"{m.template.name} {m.weight:.2f}" for m in chosen)
    notes.append(f"template chosen automatically: best normalised correlation of {kinds} templates "
                 f"({chosen[0].template.name}, {chosen[0].score:.3f}); velocity averaged over {used} "
                 "(weights by peak height)")
    return chosen, scores


@functools.lru_cache(maxsize=16)
def _library_mask(ln0, step, n):
    """Grid pixels (one set-up's data window) at air wavelengths the library templates cover."""
    ln_w = ln0 + step * np.arange(n)
    first, last = templates.library_coverage()
    w_air = vacuum_to_air(np.exp(ln_w) * u.AA).to_value(u.AA)
    return (w_air >= first) & (w_air <= last)


def library_cover(search):
    """Share of the spectrum's correlation weight at wavelengths the library templates cover."""
    lags = search.lags
    inside = _library_mask(round(lags.template_grid.ln0 + lags.step * lags.pad, 12), lags.step, lags.n)
    weight = search.side.weight
    total = float(np.sum(weight))
    return float(np.sum(weight[inside]) / total) if total > 0 else 0.0


def reference_template(reference, grid, target_r, clip_emission, notes):
    """A reference exposure (Spectrum or path) prepared as the template."""
    from .. import read

    ref = reference if not isinstance(reference, (str, Path)) else read(reference)
    rname = get_info(ref).object or get_info(ref).path or "reference exposure"
    return spectrum_template(ref, grid, target_r, f"reference {rname}", notes, clip=clip_emission)


def user_template(request, rv_kms, grid, target_r, clip_emission, notes):
    """A user template (request kind 'spectrum' or 'file') at barycentric velocity ``rv_kms``."""
    from .. import read

    tspec = request.obj if request.kind == "spectrum" else read(request.obj)
    tname = get_info(tspec).object or (str(request.obj) if request.kind == "file" else "user template")
    return spectrum_template(tspec, grid, target_r, f"user {tname}", notes, rv_kms=rv_kms, clip=clip_emission)


def automatic_type(search, resolving_power, template_grid, notes, where=None, data_short=None):
    """((sptype, lumclass), scores): the synthetic type that correlates best.

    The grid (``template_grid`` or :func:`specan.templates.automatic_types`) is scored first,
    then the neighbours of its best (:func:`neighbour_types`), each set in one batch.
    """
    grid_types = tuple(template_grid or templates.automatic_types())
    candidates = [BuiltinCandidate(st, lc, resolving_power) for st, lc in grid_types]
    bank, sc = _scored(search, candidates, data_short)
    if not np.isfinite(sc.height).any():
        raise AnalysisError("no template correlates with the spectrum", where)
    best = int(np.argmax(sc.height))
    more = [BuiltinCandidate(st, lc, resolving_power) for st, lc in neighbour_types(grid_types[best], grid_types)]
    names, heights = list(bank.names), list(sc.height)
    if more:
        bank2, sc2 = _scored(search, more, data_short)
        candidates += more
        names += list(bank2.names)
        heights += list(sc2.height)
    scores = {nm: float(h) for nm, h in zip(names, heights) if np.isfinite(h)}
    best = int(np.argmax(heights))
    sptype, lumclass = candidates[best].sptype, candidates[best].lumclass
    notes.append(f"template chosen automatically: best normalised correlation of {len(scores)} "
                 f"synthetic types ({sptype} {lumclass}, {heights[best]:.3f})")
    return (sptype, lumclass), scores


def neighbour_types(best, grid_types):
    """Types to try next to ``best`` (sptype, lumclass) that the grid lacks, in sorted order."""
    # refine around the best grid type: neighbouring subtypes and the other luminosity classes
    sptype, lumclass = best
    code0 = sptype_to_code(sptype)
    near = {(code_to_sptype(min(max(code0 + dc, 0.0), 69.0), 1), lumclass) for dc in (-3, -1.5, 1.5, 3)}
    near |= {(sptype, lc) for lc in ("V", "III", "I") if lc != lumclass}
    return sorted(near - set(grid_types))


def scan_resolving_power(search, candidate, power, chosen, notes):
    """(template, :class:`ResolvingPower`): the width of ``candidate`` that correlates best.

    The widths tried are :data:`R_SCAN` times the first guess ``power``; ``chosen`` stays when
    none correlates. At either end of the scan the value is reported as a bound.
    """
    tried = [float(f"{power.value * fac:.3g}") for fac in R_SCAN]
    widths = [prepare_builtin(candidate._replace(resolving_power=rr), search.lags.template_grid) for rr in tried]
    best = best_index(template_peaks(search, widths))
    res_r, source = power.value, power.source
    if best is not None:
        res_r, chosen = tried[best], widths[best]
    if res_r in (tried[0], tried[-1]):
        source = "template-width scan (a bound)"
        # at the end of the scan the estimate is a bound, not a value (the JHC (1984)
        # spectra, R ~ 1100 at 5000 A, all stop at the low end: measured)
        notes.append(f"resolving power unknown: the template width that correlates best is the "
                     f"{'broadest' if res_r == tried[0] else 'sharpest'} tried (R {res_r:.0f}; "
                     f"range {tried[0]:.0f}-{tried[-1]:.0f}), so R may lie beyond it "
                     "(use --resolving-power to set it)")
    else:
        notes.append(f"resolving power unknown: R ~ {res_r:.0f} from the template width that "
                     "correlates best (use --resolving-power to set it)")
    return chosen, ResolvingPower(res_r, False, source)

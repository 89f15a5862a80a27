"""``specan run``: a night's folder in, catalogue, plots and report out."""

from __future__ import annotations

import click

from ._common import exit_with_failures, overrides_from, read_options


def _formats(ctx, param, value):
    from ..pipeline import CATALOGUE_FORMATS  # the formats the pipeline can write; imported late for start-up

    names = [v.strip().lower() for v in (value or "ecsv").split(",") if v.strip()]
    bad = [n for n in names if n not in CATALOGUE_FORMATS]
    if bad:
        raise click.BadParameter(f"unknown format(s) {', '.join(bad)}; choose from {', '.join(CATALOGUE_FORMATS)}")
    return names


#: Failed inputs named one per line on the terminal; beyond this, a count (a night can hold thousands).
MAX_LISTED = 20


@click.command(name="run")
@click.argument("paths", nargs=-1, required=True)
@click.option("--out", "out_dir", required=True, type=click.Path(file_okay=False),
              help="Output folder (catalogue, plots, report); created if needed.")
@click.option("--jobs", "-j", type=click.IntRange(min=1), default=1, show_default=True,
              help="Local worker processes.")
@click.option("--dask", "dask_address", default=None, metavar="ADDRESS",
              help="Run on an existing dask.distributed cluster (scheduler address, e.g. tcp://host:8786).")
@click.option("--force", is_flag=True, help="Recompute inputs whose stored results are current.")
@click.option("--format", "formats", default="ecsv", callback=_formats, show_default=True,
              help="Catalogue formats, comma-separated: ecsv, csv, fits, votable (ECSV always written).")
@click.option("--plots", "plot_choice", type=click.Choice(["flagged", "all", "none"]), default="flagged",
              show_default=True,
              help="Which spectra get a figure: those with a flag or a declined or failed stage, every one, "
                   "or none (besides any named with --plot-for).")
@click.option("--plot-for", "plot_for", multiple=True, metavar="NAME",
              help="Draw the figure of this object or file (name, file name or path) whatever --plots says; "
                   "repeat or separate with commas.")
@click.option("--no-plots", is_flag=True, help="No per-spectrum figures (the same as --plots none).")
@click.option("--photometry", type=click.Path(exists=True, dir_okay=False), default=None,
              help="CSV of per-object V magnitudes, E(B-V), parallaxes... (matched by object name) "
                   "for distances.")
@click.option("--stages", default=None, metavar="LIST",
              help="Run only these stages, comma-separated (read, prepare, velocity, lines, classify, "
                   "physics); default all.")
@click.option("--calibration", default=None, type=click.Path(exists=True, dir_okay=False),
              help="MK calibration file from 'specan calibrate' (default: the built-in one, fitted on "
                   "the Jacoby, Hunter & Christian 1984 library).")
@read_options
def command(paths, out_dir, jobs, dask_address, force, formats, plot_choice, plot_for, no_plots, photometry, stages,
            calibration, **kwargs):
    """Analyse every spectrum in PATHS (files, folders, globs) into a catalogue and report in --out.

    Exit status: the number of inputs that failed (capped at 100), 0 when none did.
    """
    from ..pipeline import SPECTRUM_SUFFIXES, STAGES, RunInterrupted, run

    wanted = [s.strip() for s in stages.split(",") if s.strip()] if stages else None
    names = [name for name, _, _ in STAGES]
    unknown = [s for s in wanted or () if s not in names]
    if unknown:
        raise click.BadParameter(f"unknown stage(s) {', '.join(unknown)}; choose from {', '.join(names)}",
                                 param_hint="--stages")
    try:
        named = [n.strip() for item in plot_for for n in item.split(",") if n.strip()]
        summary = run(paths, out_dir, jobs=jobs, dask=dask_address, force=force, formats=formats,
                      overrides=overrides_from(kwargs), plots="none" if no_plots else plot_choice,
                      plot_for=named, stages=wanted, photometry=photometry, calibration=calibration)
    except RunInterrupted as stop:
        s = stop.summary
        click.echo(f"specan: interrupted; catalogue of what was done written to {s.outputs.get('ecsv')} "
                   f"({s.counts.get('not_run', 0)} inputs not run; rerun to finish)", err=True)
        raise SystemExit(130)
    if summary.inputs == 0:
        click.echo("specan: warning: no spectra found (folders are searched for files ending in "
                   f"{', '.join(SPECTRUM_SUFFIXES)}; name other files explicitly)", err=True)
    counts = ", ".join(f"{n} {k}" for k, n in sorted(summary.counts.items())) or "nothing to do"
    rate = f", {summary.rate:.1f} spectra/s" if summary.analysed else ""
    click.echo(f"{summary.inputs} inputs ({counts}; {summary.reused} already current) "
               f"in {summary.seconds:.1f} s{rate}; {summary.plotted} with a figure")
    if summary.flags:   # what deserves a second look, by flag (the report lists those stars first)
        click.echo("flags: " + ", ".join(f"{k} {n}" for k, n in summary.flags))
    if summary.medium_assumed:
        click.echo(f"medium: {summary.medium_assumed} files do not state air or vacuum wavelengths and were "
                   "read as the reader assumed; a wrong guess moves their velocities by ~83 km/s "
                   "(see the report; --medium fixes it)", err=True)
    not_run = [f"{n} ({why})" for n, why in summary.stages.items() if why is not None]
    if not_run:
        click.echo("stages not run: " + "; ".join(not_run), err=True)
    # each failed input on its own line, so the terminal says which file and why (the
    # catalogue holds the same reasons, the 'status' and 'reason' columns)
    for file, reason in summary.failed_inputs[:MAX_LISTED]:
        click.echo(f"specan: error: {file}: {reason}", err=True)
    if summary.failed > MAX_LISTED:
        click.echo(f"specan: ... and {summary.failed - MAX_LISTED} more failed inputs: see the catalogue's "
                   "status and reason columns", err=True)
    for name, path in summary.outputs.items():
        click.echo(f"{name}: {path}")
    for note in summary.notes:
        click.echo(f"note: {note}", err=True)
    exit_with_failures(summary.failed)

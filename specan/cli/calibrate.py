"""``specan calibrate``: fit an MK calibration from a catalogue of standards (thin layer)."""

import sys

import click

from ._common import echo_json, exit_with_failures, overrides_from, read_options


@click.command("calibrate")
@click.argument("catalog", type=click.Path(exists=True, dir_okay=False))
@click.option("--out", required=True, type=click.Path(dir_okay=False), help="Calibration file to write (JSON).")
@click.option("--resolution", type=float, default=4.5, show_default=True,
              help="FWHM of the standards in Angstrom; spectra to classify are degraded to it.")
@click.option("--source", default=None, help="Description of the standards written to the file "
                                              "(default: the catalogue path).")
@click.option("--no-velocity", is_flag=True,
              help="Do not measure and remove the standards' velocities (they are at rest).")
@read_options
@click.option("--json", "as_json", is_flag=True, help="Print the internal cross-validation summary as JSON.")
def command(catalog, out, resolution, source, no_velocity, as_json, **kwargs):
    """Learn criteria-type relations from the standards listed in CATALOG.

    CATALOG is a CSV with a file column and either sptype and lumclass or mk ("G2 V"). Rows whose
    file or type cannot be used are skipped and listed; the rest are fitted.
    """
    import importlib

    import astropy.units as u

    classify = importlib.import_module("specan.classify")
    show = (lambda p: click.echo(f"  {p}", err=True)) if sys.stderr.isatty() else None
    cal = classify.calibrate_catalog(catalog, source=source, reader_options=overrides_from(kwargs),
                                     progress=show, resolution=resolution * u.AA,
                                     measure_velocity=not no_velocity)
    path = cal.save(out)
    for row in cal.skipped_:   # left out of the fit: say so, one line each
        click.echo(f"specan: skipped standard {row['file']}: {row['reason']}", err=True)
    cv = cal.cv_
    if as_json:
        echo_json({"calibration": str(path), "standards": len(cal.standards_), "skipped": cal.skipped_,
                   "cross_validation": cv})
        exit_with_failures(len(cal.skipped_))
        return
    lum = cv["lum_group_right_B_to_K"]
    click.echo(f"wrote {path}: {len(cal.standards_)} standards at {resolution:g} A FWHM")
    click.echo(f"  internal {cv['folds']}-fold cross-validation: {cv['within_2_subclasses']:.0%} within 2 "
               f"subclasses, median error {cv['median_abs_error']:.2f} subclasses"
               + ("" if lum is None else f", luminosity group right for {lum:.0%} of B-K stars"))
    exit_with_failures(len(cal.skipped_))   # as the other commands: the number of files left out

"""``specan classify``: MK type of each file (a thin layer over specan.classify.classify)."""

import click

from ._common import echo_json, exit_with_failures, for_each_file, overrides_from, read_options


def classify_file(path, overrides, calibration):
    """Read one file and classify it; return the dict the command prints."""
    import importlib

    from .. import read

    classify = importlib.import_module("specan.classify")   # the module (specan.classify is a function)
    spectrum = read(path, **overrides)
    res = classify.classify(spectrum, calibration=calibration)
    return {
        "file": str(path),
        "sptype": res["sptype"],
        "lumclass": res["lumclass"],
        "mk": res["mk"],
        "code": res["code"],
        "subclass_err": res["subclass_err"],
        "lumclass_prob": res["lumclass_prob"],
        "teff_k": float(res["teff"].to_value("K")),
        "teff_err_k": float(res["teff_err"].to_value("K")),
        "flags": res["flags"],
        "nearest_standards": res["nearest_standards"],
        "rv_kms": None if res["rv"] is None else float(res["rv"].to_value("km/s")),
        "notes": res["notes"],
    }


@click.command("classify")
@click.argument("files", nargs=-1, required=True, type=click.Path())
@read_options
@click.option("--calibration", default=None, type=click.Path(exists=True, dir_okay=False),
              help="Calibration file from 'specan calibrate' (default: the built-in one, fitted "
                   "on the Jacoby, Hunter & Christian 1984 library).")
@click.option("--json", "as_json", is_flag=True, help="One JSON object per line per file.")
@click.pass_context
def command(ctx, files, calibration, as_json, **kwargs):
    """MK spectral type, luminosity class and Teff of each spectrum FILE."""
    import importlib

    classify = importlib.import_module("specan.classify")
    overrides = overrides_from(kwargs)
    cal = classify.Calibration.load(calibration) if calibration else classify.default_calibration()

    def show(path, d):
        if as_json:
            echo_json(d)
            return
        probs = ", ".join(f"{k} {v:.0%}" for k, v in d["lumclass_prob"].items() if v >= 0.05)
        click.echo(f"{d['file']}: {d['mk']} (+- {d['subclass_err']:.1f} subclasses; class {probs}), "
                   f"Teff {d['teff_k']:.0f} +- {d['teff_err_k']:.0f} K")
        near = ", ".join(f"{s['id']} {s['mk']}" for s in d["nearest_standards"])
        click.echo(f"  nearest standards: {near}")
        if d["flags"]:
            click.echo("  flags: " + ", ".join(d["flags"]))
        for note in d["notes"]:
            click.echo(f"  note: {note}")

    failures = for_each_file(files, lambda p: classify_file(p, overrides, cal), show, as_json,
                             debug=ctx.obj.get("debug", False))
    exit_with_failures(failures)

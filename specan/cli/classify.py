"""``specan classify``: MK type of each file (a thin layer over specan.classify.classify)."""

import click

from ._common import echo_json, exit_with_failures, for_each_file, overrides_from, read_options


def classify_file(path, overrides, calibration, photometry=None, v_keyword=None):
    """Read one file, classify it and derive what the inputs allow; return the dict the command prints."""
    import importlib

    from .. import physics, read

    classify = importlib.import_module("specan.classify")   # the module (specan.classify is a function)
    spectrum = read(path, **overrides)
    res = classify.classify(spectrum, calibration=calibration)
    out = {
        "file": str(path),
        "object": spectrum.meta["specan"].object,
        "sptype": res["sptype"],
        "lumclass": res["lumclass"],
        "mk": res["mk"],
        "code": res["code"],
        "subclass_err": res["subclass_err"],
        "lumclass_prob": res["lumclass_prob"],
        "teff_k": float(res["teff"].to_value("K")),
        "teff_err_k": float(res["teff_err"].to_value("K")),
        "flags": list(res["flags"]),
        "nearest_standards": res["nearest_standards"],
        "type_evidence": res["type_evidence"],
        "library_neighbours": res["library_neighbours"],
        "rv_kms": None if res["rv"] is None else float(res["rv"].to_value("km/s")),
        "notes": list(res["notes"]),
    }
    # Temperatures, distance and speeds from the type, photometry and (flux-calibrated) spectrum.
    row = None
    if photometry is not None:
        row = physics.photometry_for(photometry, out["object"])
        if row is None:
            out["notes"].append(f"no photometry row for {out['object']!r}")
    elif v_keyword:
        row = physics.photometry_from_header(spectrum, v_keyword)
        if row is None:
            out["notes"].append(f"no number in header keyword {v_keyword!r}: no distance")
    derived = physics.derive(res, None, row, spectrum)
    for key in ("teff_color_k", "teff_color_err_k", "distance_pc", "distance_err_pc", "distance_lo_pc",
                "distance_hi_pc", "m_v_abs", "m_v_abs_err", "a_v"):
        out[key] = derived.get(key)
    out["flags"] += [f for f in derived.get("flags", []) if f not in out["flags"]]
    out["notes"] += list(derived.get("notes", []))
    return out


@click.command("classify")
@click.argument("files", nargs=-1, required=True, type=click.Path())
@read_options
@click.option("--calibration", default=None, type=click.Path(exists=True, dir_okay=False),
              help="Calibration file from 'specan calibrate' (default: the built-in one, fitted "
                   "on the Jacoby, Hunter & Christian 1984 library).")
@click.option("--photometry", default=None, type=click.Path(exists=True, dir_okay=False),
              help="CSV of object name, V, its error, optional E(B-V), parallax, proper motions "
                   "(see specan.physics.load_photometry) for distances.")
@click.option("--v-keyword", default=None, help="Header keyword holding the apparent V magnitude.")
@click.option("--json", "as_json", is_flag=True, help="One JSON object per line per file.")
@click.pass_context
def command(ctx, files, calibration, photometry, v_keyword, as_json, **kwargs):
    """MK spectral type, luminosity class and Teff of each spectrum FILE."""
    import importlib

    classify = importlib.import_module("specan.classify")
    overrides = overrides_from(kwargs)
    cal = classify.Calibration.load(calibration) if calibration else classify.default_calibration()
    phot = None
    if photometry:
        from ..physics import load_photometry

        bad = {}
        phot = load_photometry(photometry, bad_rows=bad)
        for name, reason in bad.items():   # the other objects' lines are still used
            click.echo(f"specan: warning: photometry line for {name!r} not used: {reason}", err=True)

    def show(path, d):
        if as_json:
            echo_json(d)
            return
        probs = ", ".join(f"{k} {v:.0%}" for k, v in d["lumclass_prob"].items() if v >= 0.05)
        click.echo(f"{d['file']}: {d['mk']} (+- {d['subclass_err']:.1f} subclasses; class {probs}), "
                   f"Teff {d['teff_k']:.0f} +- {d['teff_err_k']:.0f} K")
        near = ", ".join(f"{s['id']} {s['mk']}" for s in d["nearest_standards"])
        click.echo(f"  nearest standards: {near}")
        if d["library_neighbours"]:
            like = ", ".join(f"{s['name']} {s['mk']}" for s in d["library_neighbours"])
            click.echo(f"  most alike library stars (MILES): {like}")
        if d["distance_pc"] is not None:
            click.echo(f"  distance {d['distance_pc']:.0f} pc ({d['distance_lo_pc']:.0f}-{d['distance_hi_pc']:.0f}), "
                       f"M_V {d['m_v_abs']:.2f}")
        if d["teff_color_k"] is not None:
            click.echo(f"  colour temperature {d['teff_color_k']:.0f} +- {d['teff_color_err_k']:.0f} K")
        if d["flags"]:
            click.echo("  flags: " + ", ".join(d["flags"]))
        for note in d["notes"]:
            click.echo(f"  note: {note}")

    failures = for_each_file(files, lambda p: classify_file(p, overrides, cal, phot, v_keyword), show, as_json,
                             debug=ctx.obj.get("debug", False))
    exit_with_failures(failures)

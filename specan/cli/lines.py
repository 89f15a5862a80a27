"""``specan lines``: equivalent widths and band indices of each file (thin layer over specan.lines)."""

import click

from ..errors import SpecanError
from ._common import echo_json, exit_with_failures, for_each_file, overrides_from, read_options


def _aa(q):
    return float(q.to_value("Angstrom"))


def lines_file(path, overrides, options):
    """Read one file, measure its lines and indices; return the dict the command prints."""
    from .. import read
    from ..lines import analyse

    spectrum = read(path, **overrides)
    options = dict(options)
    rv_source = "given"
    type_source = "given" if options.get("star_type") else None
    if options["rv"] == "measure":
        # each line is looked for within one resolution element of its shifted place, so the
        # star's velocity matters (at rest a 560 km/s star at R~2000 lost most of its lines)
        from ..velocity import measure

        try:
            vel = measure(spectrum, errors="td", barycentric=False)
            options["rv"] = vel["rv_topo"]
            rv_source = "velocity stage (cross-correlation)"
            if not options.get("star_type") and vel.get("template_type"):
                # the best template's type is close enough to rule out He I in a G star
                options["star_type"] = vel["template_type"]
                type_source = "velocity template"
        except SpecanError:
            options["rv"] = None
    if options["rv"] is None:
        rv_source = "estimated from the strongest features"
    res = analyse(spectrum, **options)
    table, indices = res["lines"], res["indices"]
    rows = []
    for r in table:
        rows.append({
            "id": str(r["id"]), "species": str(r["species"]),
            "wave_air_aa": _aa(r["wave_air"]), "wave_vac_aa": _aa(r["wave_vac"]),
            "wave_obs_aa": _aa(r["wave_obs"]),
            "ew_aa": _aa(r["ew"]), "ew_err_aa": _aa(r["ew_err"]),
            "ew_err_cayrel_aa": _aa(r["ew_err_cayrel"]), "ew_err_blend_aa": _aa(r["ew_err_blend"]),
            "ew_fit_aa": _aa(r["ew_fit"]),
            "fwhm_aa": _aa(r["fwhm"]), "depth": float(r["depth"]), "fit_chi2": float(r["fit_chi2"]),
            "method": str(r["method"]),
            "blend": [b for b in str(r["blend"]).split(",") if b],
            "detected": bool(r["detected"]), "emission": bool(r["emission"]),
            "expected": bool(r["expected"]),
        })
    idx = {str(r["name"]): {"value": float(r["value"]), "err": float(r["err"]), "unit": str(r["unit"])}
           for r in indices}
    unknown = [{"wave_obs_aa": _aa(r["wave_obs"]), "depth": float(r["depth"]),
                "significance": float(r["significance"]), "emission": bool(r["emission"])}
               for r in (res["unidentified"] if res["unidentified"] is not None else [])]
    meta = table.meta
    return {"file": str(path), "rv_kms": float(meta["rv"].to_value("km/s")), "rv_source": rv_source,
            "resolving_power": meta["resolving_power"],
            "resolving_power_source": meta["resolving_power_source"], "medium": meta["medium"],
            "star_type": meta.get("star_type"), "star_type_source": type_source if meta.get("star_type") else None,
            "lines": rows, "indices": idx, "unidentified": unknown}


def _fmt(v, spec):
    return "nan" if v is None or v != v else format(v, spec)


@click.command("lines")
@click.argument("files", nargs=-1, required=True, type=click.Path())
@read_options
@click.option("--list", "linelist", default=None,
              help="Line list: 'stellar' (default) or an ECSV file (see linelists/README.md).")
@click.option("--bands", default=None, help="Band-index definitions: 'bands' (default) or an ECSV file.")
@click.option("--rv", default="measure", show_default=True,
              help="Radial velocity in km/s used to place the lines; 'measure' takes the velocity "
                   "stage's (cross-correlation), 'auto' estimates it from the strongest features.")
@click.option("--profile", type=click.Choice(["auto", "gauss", "voigt"]), default="auto", show_default=True,
              help="Profile fitted to lines (auto: Voigt for hydrogen and very strong lines).")
@click.option("--star-type", default=None,
              help="MK type of the star (e.g. 'G2 V'): absorption lines of species too hot for it (He I in a "
                   "G star) are not counted as found. Default: the velocity template's type with --rv measure.")
@click.option("--all", "show_all", is_flag=True, help="Also list lines that were not detected.")
@click.option("--json", "as_json", is_flag=True, help="One JSON object per line per file.")
@click.pass_context
def command(ctx, files, linelist, bands, rv, profile, star_type, show_all, as_json, **kwargs):
    """Equivalent widths, widths and band indices of each spectrum FILE."""
    import astropy.units as u

    if rv.strip().lower() == "auto":
        rv_q = None
    elif rv.strip().lower() == "measure":
        rv_q = "measure"
    else:
        try:
            rv_q = float(rv) * u.km / u.s
        except ValueError:
            raise click.BadParameter(f"{rv!r} is neither a number (km/s) nor 'measure' or 'auto'",
                                     param_hint="--rv") from None
    overrides = overrides_from(kwargs)
    options = {"linelist": linelist, "bands": bands, "rv": rv_q, "profile": profile, "star_type": star_type}

    def show(path, d):
        if as_json:
            echo_json(d)
            return
        typed = f", lines expected at {d['star_type']} ({d['star_type_source']})" if d["star_type"] else ""
        click.echo(f"{d['file']}: rv {d['rv_kms']:+.1f} km/s ({d['rv_source']}), R {d['resolving_power']:.0f} "
                   f"({d['resolving_power_source']}), {d['medium']} wavelengths{typed}")
        click.echo(f"  {'line':<12} {'lab':>9} {'obs':>9} {'EW/A':>8} {'err':>7} {'FWHM':>6} "
                   f"{'depth':>6}  method / notes")
        for r in d["lines"]:
            if not (r["detected"] or show_all):
                continue
            lab = r["wave_vac_aa"] if d["medium"] == "vacuum" else r["wave_air_aa"]
            notes = [r["method"]]
            if r["emission"]:
                notes.append("EMISSION")
            if not r["expected"]:
                notes.append(f"not expected at {d['star_type']}")
            elif not r["detected"]:
                notes.append("not detected")
            if r["blend"]:
                notes.append("blend: " + ",".join(r["blend"]))
            if r["ew_err_blend_aa"] == r["ew_err_blend_aa"] and r["ew_err_blend_aa"] > 0:
                # the high Balmer lines' share no one can assign (specan.lines.hydrogen_blends), inside ew_err
                notes.append(f"+-{r['ew_err_blend_aa']:.2f} of it unassignable")
            click.echo(f"  {r['id']:<12} {lab:9.2f} {_fmt(r['wave_obs_aa'], '9.2f')} "
                       f"{_fmt(r['ew_aa'], '8.3f')} {_fmt(r['ew_err_aa'], '7.3f')} "
                       f"{_fmt(r['fwhm_aa'], '6.2f')} {_fmt(r['depth'], '6.3f')}  {'; '.join(notes)}")
        if d["unidentified"]:
            click.echo("  unidentified strong features: " + ", ".join(
                f"{u['wave_obs_aa']:.1f}{' (emission)' if u['emission'] else ''}" for u in d["unidentified"]))
        shown = {k: v for k, v in d["indices"].items() if v["value"] == v["value"]}
        if shown:
            click.echo("  indices: " + ", ".join(
                f"{k} {v['value']:.3f}+-{v['err']:.3f}{(' ' + v['unit']) if v['unit'] else ''}"
                for k, v in shown.items()))

    failures = for_each_file(files, lambda p: lines_file(p, overrides, options), show,
                             as_json=as_json, debug=ctx.obj.get("debug", False) if ctx.obj else False)
    exit_with_failures(failures)

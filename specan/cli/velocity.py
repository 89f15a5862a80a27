"""``specan velocity``: radial velocity of each file (a thin layer over specan.velocity.measure)."""

import click

from ._common import echo_json, exit_with_failures, for_each_file, overrides_from, read_options


def _q(value):
    return None if value is None else float(value.to_value("km/s"))


def measure_file(path, overrides, options):
    """Read one file, measure its velocity; return the dict the command prints."""
    from .. import read
    from ..velocity import measure

    spectrum = read(path, **overrides)
    res = measure(spectrum, **options)
    return {
        "file": str(path),
        "rv_kms": _q(res["rv"]),
        "rv_err_kms": _q(res["rv_err"]),
        "frame": res["frame"],
        "rv_topo_kms": _q(res["rv_topo"]),
        "bary_corr_kms": _q(res["bary_corr"]),
        "v_grf_kms": _q(res["v_grf"]),
        "template": res["template"],
        "ccf_height": res["ccf_height"],
        "flags": res["flags"],
        "second_peak_rv_kms": _q(res["second_peak_rv"]),
        "rv_err_noise_kms": _q(res["rv_err_noise"]),
        "rv_err_template_kms": _q(res["rv_err_template"]),
        "rv_err_mismatch_kms": _q(res["rv_err_mismatch"]),
        "rv_err_choice_kms": _q(res["rv_err_choice"]),
        "rv_err_zero_point_kms": _q(res["rv_err_zero_point"]),
        "birge_ratio": res["birge_ratio"],
        "rv_err_td_kms": _q(res["rv_err_td"]),
        "rv_err_mc_kms": _q(res["rv_err_mc"]),
        "template_type": res["template_type"],
        "template_kind": res["template_kind"],
        "templates": [{**t, "rv_offset": _q(t["rv_offset"])} for t in res["templates"]],
        "medium_assumed": res["medium_assumed"],
        "medium_shift_kms": _q(res["medium_shift"]),
        "notes": res["notes"],
    }


@click.command("velocity")
@click.argument("files", nargs=-1, required=True, type=click.Path())
@read_options
@click.option("--template", default=None,
              help="'auto' (default: every built-in template scored, the velocity averaged over the best), "
                   "'library:NAME', an MK type ('G2 V'), 'synth' (best synthetic type), 'mask' or "
                   "'mask:K0 III' (line mask), or a spectrum FILE (e.g. an RV standard).")
@click.option("--template-rv", type=float, default=0.0, show_default=True,
              help="Barycentric velocity (km/s) of a template FILE.")
@click.option("--reference", default=None, type=click.Path(exists=True),
              help="Reference exposure of the same star: report velocities relative to it.")
@click.option("--vmax", type=float, default=2000.0, show_default=True, help="Search range +-km/s.")
@click.option("--errors", type=click.Choice(["auto", "both", "td", "mc"]), default="auto", show_default=True,
              help="Error estimates reported beside the error budget: 'auto'/'td' the Tonry-Davis r statistic, "
                   "'both'/'mc' also noise resampling.")
# The two thresholds default to specan.velocity's constants (not repeated here, so the CLI and
# the Python API cannot drift apart; the help quotes them and a test checks it does so rightly).
@click.option("--high-velocity", type=float, default=None,
              help="|v_GRF| (km/s) above which a star is flagged high_velocity [default: 300].")
@click.option("--escape-speed", type=float, default=None,
              help="Local escape speed (km/s) for unbound_candidate [default: 533, Piffl et al. 2014].")
@click.option("--no-telluric-mask", is_flag=True, help="Do not mask telluric bands.")
@click.option("--json", "as_json", is_flag=True, help="One JSON object per line per file.")
@click.pass_context
def command(ctx, files, template, template_rv, reference, vmax, errors, high_velocity, escape_speed,
            no_telluric_mask, as_json, **kwargs):
    """Radial velocity of each spectrum FILE by cross-correlation, barycentric when possible."""
    import astropy.units as u

    overrides = overrides_from(kwargs)
    options = {"template": template, "template_rv": template_rv * u.km / u.s, "vmax": vmax * u.km / u.s,
               "errors": errors, "telluric": not no_telluric_mask}
    if high_velocity is not None:
        options["high_velocity"] = high_velocity * u.km / u.s
    if escape_speed is not None:
        options["escape_speed"] = escape_speed * u.km / u.s
    if reference is not None:
        from .. import read

        options["reference"] = read(reference, **overrides)

    def show(path, d):
        if as_json:
            echo_json(d)
            return
        err = "n/a" if d["rv_err_kms"] is None else f"{d['rv_err_kms']:.2f}"
        click.echo(f"{d['file']}: {d['rv_kms']:+.2f} +- {err} km/s ({d['frame']}), "
                   f"template {d['template']}, CCF peak {d['ccf_height']:.3f}")
        extra = []
        if d["bary_corr_kms"] is not None:
            extra.append(f"topocentric {d['rv_topo_kms']:+.2f}, barycentric correction {d['bary_corr_kms']:+.3f}")
        if d["v_grf_kms"] is not None:
            extra.append(f"Galactic rest frame {d['v_grf_kms']:+.1f}")
        if d["second_peak_rv_kms"] is not None:
            extra.append(f"second peak {d['second_peak_rv_kms']:+.1f}")
        if extra:
            click.echo("  " + "; ".join(extra) + " km/s")
        if d["flags"]:
            click.echo("  flags: " + ", ".join(d["flags"]))
        for note in d["notes"]:
            if note.startswith(("topocentric", "no Galactic", "peak at the edge", "|v_grf|", "wavelength medium",
                                "no CRPIX1", "wavelength unit", "error budget")):
                click.echo(f"  note: {note}")

    failures = for_each_file(files, lambda p: measure_file(p, overrides, options), show, as_json,
                             debug=ctx.obj.get("debug", False))
    exit_with_failures(failures)

"""``specan inspect``: what the reader understood of each file."""

import click

from ._common import echo_json, exit_with_failures, for_each_file, overrides_from, read_options


def summarize(path, overrides):
    """Read and prepare one file; return the summary dict the command prints."""
    import astropy.units as u

    from .. import read
    from ..obsinfo import get_info
    from ..prepare import mask_bad, snr

    spectrum = read(path, **overrides)
    info = get_info(spectrum)
    s = snr(mask_bad(spectrum))
    wave = spectrum.spectral_axis.to_value(u.AA)
    return {
        "file": str(path),
        "object": info.object,
        "format": info.format,
        "wave_min_aa": float(wave[0]),
        "wave_max_aa": float(wave[-1]),
        "medium": info.medium,
        "n_pixels": int(wave.size),
        "snr": s["snr"],
        "snr_source": s["snr_source"],
        "snr_err_array": s["snr_err_array"],
        "snr_flux": s["snr_flux"],
        "snr_flux_method": s["snr_flux_method"],
        "mjd_mid": info.mjd_mid,
        "ra_deg": info.ra_deg,
        "dec_deg": info.dec_deg,
        "site_known": info.site is not None,
        "flux_unit": str(spectrum.flux.unit) or "relative",
        "warnings": list(info.warnings),
    }


@click.command("inspect")
@click.argument("files", nargs=-1, required=True, type=click.Path())
@read_options
@click.option("--json", "as_json", is_flag=True, help="One JSON object per line per file.")
@click.pass_context
def command(ctx, files, as_json, **kwargs):
    """Show what specan understood of each spectrum FILE."""
    overrides = overrides_from(kwargs)

    def show(path, d):
        if as_json:
            echo_json(d)
            return
        source = d["snr_flux_method"] if d["snr_source"] == "flux" else d["snr_source"]
        snr = "n/a" if d["snr"] is None else f"{d['snr']:.0f} (from the {source})"
        if d["snr_err_array"] is not None:
            flux_part = "none found" if d["snr_flux"] is None else f"{d['snr_flux']:.0f}"
            snr += f"; from the flux {flux_part}"
        when = "unknown" if d["mjd_mid"] is None else f"MJD {d['mjd_mid']:.5f}"
        where = "unknown" if d["ra_deg"] is None else f"{d['ra_deg']:.5f} {d['dec_deg']:+.5f} deg"
        click.echo(f"{d['file']}: {d['object']}  [{d['format']}]")
        click.echo(f"  {d['wave_min_aa']:.2f}-{d['wave_max_aa']:.2f} A ({d['medium']}), {d['n_pixels']} px, "
                   f"flux {d['flux_unit']}")
        click.echo(f"  S/N per pixel {snr}")
        click.echo(f"  mid-exposure {when}; pointing {where}; site {'known' if d['site_known'] else 'unknown'}")
        for w in d["warnings"]:
            click.echo(f"  note: {w}")

    failures = for_each_file(files, lambda p: summarize(p, overrides), show, as_json,
                             debug=ctx.obj.get("debug", False))
    exit_with_failures(failures)

"""Reference frames and the speeds that flag a star: barycentric correction, Galactic rest frame.

Shared by the velocity stage (v_GRF of the line-of-sight velocity), physics (full space
velocity) and the report (which states the frame and thresholds used). The barycentric
correction is ``SkyCoord.radial_velocity_correction``'s, on astropy's own observer velocity,
with its gravitational-redshift term taken once per site and day (within 1e-2 m/s of
astropy's, tested; about half its cost), and the Galactic rest frame is astropy's ``Galactocentric`` frame with
its "v4.0" parameters, pinned so that results do not change with astropy's default.
"""

from __future__ import annotations

import functools

import astropy.units as u
import numpy as np

from .errors import MetadataError

__all__ = [
    "HIGH_VELOCITY",
    "ESCAPE_SPEED",
    "GALACTOCENTRIC_PARAMETERS",
    "missing_for_barycentric",
    "barycentric_correction",
    "galactocentric_parameters",
    "galactocentric_frame",
    "galactic_frame_note",
    "galactic_rest_frame_velocity",
]

#: Default |v_GRF| above which a star is flagged ``high_velocity`` (common practice).
HIGH_VELOCITY = 300.0 * u.km / u.s
#: Default local escape speed: Piffl et al. (2014, A&A 562, A91), 533 km/s (from memory).
ESCAPE_SPEED = 533.0 * u.km / u.s

#: Solar position and motion used for every Galactocentric transformation: astropy's
#: "v4.0" parameter set, pinned so results do not change with astropy's default.
#: R0 = 8.122 kpc (GRAVITY Collaboration 2018), z_sun = 20.8 pc (Bennett & Bovy 2019),
#: v_sun = (12.9, 245.6, 7.78) km/s (Drimmel & Poggio 2018; Reid & Brunthaler 2004; GRAVITY 2018).
GALACTOCENTRIC_PARAMETERS = "astropy Galactocentric frame, parameter set v4.0"


def missing_for_barycentric(info):
    """What an :class:`~specan.obsinfo.ObsInfo` lacks for a barycentric correction.

    Returns
    -------
    list of str
        One phrase per missing item, naming the header keyword or option that supplies it;
        empty when the correction can be computed.
    """
    missing = []
    if info.time_mid is None:
        missing.append("observation time (header DATE-OBS with EXPTIME, or MJD-OBS)")
    if info.ra_deg is None or info.dec_deg is None:
        missing.append("pointing (header RA/DEC, or the --ra/--dec options)")
    if info.site is None:
        missing.append("observatory site (header OBSGEO-X/Y/Z or OBSGEO-B/L/H, or the --site option)")
    return missing


def barycentric_correction(info):
    """Barycentric velocity correction at mid-exposure (astropy's, see :func:`_correction_kms`).

    Parameters
    ----------
    info : specan.obsinfo.ObsInfo
        Needs ``time_mid``, ``ra_deg``/``dec_deg`` (with ``radesys``) and ``site``.

    Returns
    -------
    astropy.units.Quantity
        ``SkyCoord.radial_velocity_correction(kind="barycentric", obstime=info.time_mid,
        location=info.site)`` in km/s (to 1e-3 m/s): add it to a topocentric velocity (as
        (1 + z_b) = (1 + z_obs)(1 + v_corr/c)).

    Raises
    ------
    specan.errors.MetadataError
        Naming what is missing and the keyword or option that supplies it.
    """
    missing = missing_for_barycentric(info)
    if missing:
        raise MetadataError("no barycentric correction: missing " + "; ".join(missing), info.path)
    return _correction_kms(info.coord, info.time_mid, info.site) * (u.km / u.s)


def _correction_kms(coord, obstime, site):
    """``coord.radial_velocity_correction(kind="barycentric", obstime, location=site)`` in km/s.

    For a direction without distance or motion (what headers give) this is astropy's own
    formula on astropy's own observer velocity (the Earth's from ``get_body_barycentric_posvel``,
    the site's from ``EarthLocation.get_gcrs_posvel``), with one difference: the gravitational
    redshift at the site (the Sun's, Jupiter's, the Moon's and the Earth's potential, about
    3 m/s, astropy's ``EarthLocation.gravitational_redshift``) is taken once per site and UTC
    day, not per call (it cost half of each call, and changes by less than 1e-3 m/s within a
    day: the Sun's distance changes by < 2e-4 of itself). Anything else (a distance, a space
    motion) goes to astropy whole.
    """
    from astropy.coordinates import UnitSphericalRepresentation, get_body_barycentric_posvel

    if coord.data.__class__ is not UnitSphericalRepresentation or coord.data.differentials:
        return coord.radial_velocity_correction(kind="barycentric", obstime=obstime,
                                                location=site).to_value(u.km / u.s)
    c = _C_MS
    _, v_earth = get_body_barycentric_posvel("earth", obstime)
    _, v_site = site.get_gcrs_posvel(obstime)
    beta = (v_earth.xyz.to_value(u.m / u.s) + v_site.xyz.to_value(u.m / u.s)) / c
    toward = coord.icrs.cartesian.xyz.value
    gamma = 1.0 / np.sqrt(1.0 - np.sum(beta * beta))
    geocentric = tuple(float(q.to_value(u.m)) for q in site.geocentric)
    zb = gamma * (1.0 + np.sum(beta * toward)) / (1.0 + _redshift_ms(geocentric, int(np.floor(obstime.utc.mjd))) / c)
    return float((zb - 1.0) * c) / 1000.0


_C_MS = 299792458.0  # m/s, exact (SI definition of the metre)


@functools.lru_cache(maxsize=64)
def _redshift_ms(geocentric, mjd_day):
    """astropy's gravitational redshift (m/s) at a site (geocentric x, y, z in m) at noon UTC of a day."""
    from astropy.coordinates import EarthLocation
    from astropy.time import Time

    site = EarthLocation.from_geocentric(*geocentric, unit=u.m)
    return float(site.gravitational_redshift(Time(mjd_day + 0.5, format="mjd", scale="utc")).to_value(u.m / u.s))


def galactocentric_parameters():
    """astropy's "v4.0" Galactocentric parameter set (``parameters`` and ``references``)."""
    from astropy.coordinates import galactocentric_frame_defaults

    return galactocentric_frame_defaults.get_from_registry("v4.0")


def _xyz(vec):
    """km/s components of a Cartesian representation or differential."""
    q = vec.d_xyz if hasattr(vec, "d_xyz") else vec.xyz
    return q.to_value(u.km / u.s)


@functools.lru_cache(maxsize=1)
def galactocentric_frame():
    """The one (cached) ``Galactocentric`` frame every Galactic-rest-frame quantity uses."""
    from astropy.coordinates import Galactocentric

    return Galactocentric(**galactocentric_parameters()["parameters"])


@functools.lru_cache(maxsize=1)
def galactic_frame_note():
    """One sentence naming the Galactic rest frame and the Sun's velocity in it, for outputs."""
    refs = galactocentric_parameters().get("references", {})
    v = _xyz(galactocentric_frame().galcen_v_sun)
    return (f"Galactic rest frame: astropy Galactocentric 'v4.0' parameters, v_sun = "
            f"({v[0]:.2f}, {v[1]:.2f}, {v[2]:.2f}) km/s"
            f" ({'; '.join(f'{k}: {r}' for k, r in refs.items() if k in ('galcen_v_sun', 'galcen_distance'))})")


@functools.lru_cache(maxsize=1)
def _sun_velocity_icrs():
    """The Sun's velocity in the Galactic rest frame, on ICRS axes (km/s), computed once.

    A point at rest at the Galactic centre, seen from the barycentre, moves at minus the
    Sun's velocity; astropy's Galactocentric transformation gives it on ICRS axes.
    """
    from astropy.coordinates import CartesianDifferential, CartesianRepresentation, SkyCoord

    rest = CartesianRepresentation([0.0, 0.0, 0.0] * u.kpc,
                                   differentials=CartesianDifferential([0.0, 0.0, 0.0] * u.km / u.s))
    return -SkyCoord(rest, frame=galactocentric_frame()).icrs.velocity.d_xyz.to_value(u.km / u.s)


def galactic_rest_frame_velocity(rv, coord):
    """Line-of-sight velocity in the Galactic rest frame: ``rv`` plus the Sun's motion projected.

    Parameters
    ----------
    rv : astropy.units.Quantity
        Barycentric radial velocity.
    coord : astropy.coordinates.SkyCoord
        Direction of the star.

    Returns
    -------
    astropy.units.Quantity
        v_GRF in km/s, with astropy's Galactocentric "v4.0" defaults (solar motion
        Drimmel & Poggio 2018 / Reid & Brunthaler 2004, R0 GRAVITY 2018).
    """
    icrs = coord.icrs
    ra, dec = icrs.ra.rad, icrs.dec.rad
    toward = np.array([np.cos(dec) * np.cos(ra), np.cos(dec) * np.sin(ra), np.sin(dec)])
    return (u.Quantity(rv, u.km / u.s).value + float(_sun_velocity_icrs() @ toward)) * (u.km / u.s)

"""Reference frames and the speeds that flag a star: barycentric correction, Galactic rest frame.

Shared by the velocity stage (v_GRF of the line-of-sight velocity), physics (full space
velocity) and the report (which states the frame and thresholds used). The barycentric
correction is ``SkyCoord.radial_velocity_correction``'s formula on astropy's own observer
velocity, computed for a whole UTC day per site in one call and interpolated, with its
gravitational-redshift term taken once per site and day (within 1e-2 m/s of astropy's,
tested; ~0.1 ms a spectrum instead of ~5), and the Galactic rest frame is astropy's
``Galactocentric`` frame with its "v4.0" parameters, pinned so that results do not change with
astropy's default: the Sun's velocity in it is one constant vector, projected on the pointing.
"""

from __future__ import annotations

import functools
import math

import astropy.units as u
import numpy as np

from .errors import MetadataError

__all__ = [
    "HIGH_VELOCITY",
    "ESCAPE_SPEED",
    "GALACTOCENTRIC_PARAMETERS",
    "missing_for_barycentric",
    "barycentric_correction",
    "pointing_direction",
    "galactocentric_parameters",
    "galactocentric_frame",
    "galactic_frame_note",
    "galactic_rest_frame_velocity",
    "sun_motion_toward_kms",
]

_KMS = u.km / u.s   # made once: composing the unit costs as much as the rest of a correction

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
    return _toward_kms(pointing_direction(info), info.time_mid, info.site) * _KMS


def pointing_direction(info):
    """Unit vector (ICRS axes) towards the pointing of an :class:`~specan.obsinfo.ObsInfo`.

    What ``info.coord.icrs.cartesian.xyz`` gives; an ICRS pointing by the spherical-to-Cartesian
    formula itself (astropy's frame machinery costs ~1 ms a call for this), an FK5 or FK4 one
    through astropy's transformation, once per pointing.
    """
    if info.pointing_frame == "icrs":
        ra, dec = math.radians(float(info.ra_deg)), math.radians(float(info.dec_deg))
        return np.array([math.cos(dec) * math.cos(ra), math.cos(dec) * math.sin(ra), math.sin(dec)])
    return _frame_direction(info)


_DIRECTIONS = {}


def _frame_direction(info):
    """ICRS unit vector of an FK5 or FK4 pointing, transformed once per pointing (and equinox)."""
    key = (float(info.ra_deg), float(info.dec_deg), info.pointing_frame, info.equinox)
    toward = _DIRECTIONS.get(key)
    if toward is None:
        toward = info.coord.icrs.cartesian.xyz.value
        toward.flags.writeable = False   # shared by every spectrum of the pointing
        if len(_DIRECTIONS) >= 4096:   # a bound on memory over a long night; any entry is recomputable
            _DIRECTIONS.clear()
        _DIRECTIONS[key] = toward
    return toward


def _correction_kms(coord, obstime, site):
    """``coord.radial_velocity_correction(kind="barycentric", obstime, location=site)`` in km/s.

    For a direction without distance or motion (what headers give) this is astropy's own
    formula, on astropy's own observer velocity taken from a table per site and UTC day
    (:func:`_toward_kms`). Anything else (a distance, a space motion) goes to astropy whole.
    """
    from astropy.coordinates import UnitSphericalRepresentation

    if coord.data.__class__ is not UnitSphericalRepresentation or coord.data.differentials:
        return coord.radial_velocity_correction(kind="barycentric", obstime=obstime,
                                                location=site).to_value(u.km / u.s)
    return _toward_kms(coord.icrs.cartesian.xyz.value, obstime, site)


def _toward_kms(toward, obstime, site):
    """astropy's barycentric correction (km/s) towards the ICRS unit vector ``toward``.

    astropy's formula for a direction without distance: (1 + z_b) = gamma (1 + beta . n) /
    (1 + gravitational redshift / c), beta the observer's barycentric velocity over c (the
    Earth's from ``get_body_barycentric_posvel``, the site's from ``EarthLocation.get_gcrs_posvel``).
    The observer's velocity is astropy's, computed for the whole UTC day at once at the nodes of
    :func:`_observer_table` and interpolated (the interpolation within 1e-5 m/s of astropy's own
    value at the time, measured; the whole correction within 1e-3 m/s of astropy's, tested); the gravitational redshift at the site (the Sun's, Jupiter's, the Moon's and the
    Earth's potential, about 3 m/s, astropy's ``EarthLocation.gravitational_redshift``) is taken
    once per site and day (it changes by less than 1e-3 m/s within a day: the Sun's distance
    changes by < 2e-4 of itself). Both were most of the cost of a call (~5 ms).
    """
    c = _C_MS
    geocentric = _geocentric_m(site)
    mjd = float(obstime.utc.mjd)
    day = int(math.floor(mjd))
    beta = _observer_velocity_ms(geocentric, day, mjd - day) / c
    gamma = 1.0 / math.sqrt(1.0 - float(np.sum(beta * beta)))
    zb = gamma * (1.0 + float(np.sum(beta * np.asarray(toward, float)))) / (1.0 + _redshift_ms(geocentric, day) / c)
    return float((zb - 1.0) * c) / 1000.0


_C_MS = 299792458.0  # m/s, exact (SI definition of the metre)


def _geocentric_m(site):
    """(x, y, z) of an EarthLocation in metres, as plain floats (a hashable key for the tables)."""
    xyz = site.to_value(u.m)
    return (float(xyz["x"]), float(xyz["y"]), float(xyz["z"]))


#: Spacing (days) of the observer-velocity table and its interpolation order (points): the site
#: turns with the Earth (465 m/s at the equator, one turn a sidereal day; from memory), the Earth's own
#: velocity changes over the month (the Moon) and the year; 6-point Lagrange interpolation at
#: 30 minutes is within 1e-5 m/s of astropy's values (measured; 4 points: 3e-3 m/s). Our choice.
TABLE_STEP = 1.0 / 48.0
TABLE_ORDER = 6


def _observer_velocity_ms(geocentric, day, frac):
    """The observer's barycentric velocity (m/s, ICRS axes) at a site at MJD ``day + frac`` (UTC),
    by polynomial (Lagrange) interpolation of :func:`_observer_table` over the :data:`TABLE_ORDER`
    nodes about it (scipy's barycentric form, :func:`_interpolant`)."""
    nodes, _ = _observer_table(geocentric, day)
    first = int(math.floor((frac - nodes[0]) / TABLE_STEP)) - (TABLE_ORDER // 2 - 1)
    first = min(max(first, 0), nodes.size - TABLE_ORDER)
    return _interpolant(geocentric, day, first)(frac)


@functools.lru_cache(maxsize=256)
def _interpolant(geocentric, day, first):
    """The Lagrange polynomial through the :data:`TABLE_ORDER` nodes of :func:`_observer_table` from
    ``first``, in the barycentric form scipy's ``barycentric_interpolate`` evaluates (Berrut & Trefethen
    2004, SIAM Review 46, 501; from memory), its weights made once per site, day and window.

    ``barycentric_interpolate`` made the weights afresh each call (~0.08 ms of its 0.1, measured) and
    multiplied their factors in a random order drawn from numpy's global random state: the same call
    repeated moved the velocity's last bit in 58% of 2,000 times of a day (by up to 1.5e-11 m/s,
    measured), so a result depended on what else had drawn random numbers before. Here the factors are
    multiplied in the nodes' order: the same bits in every process; within 1e-10 m/s of scipy's
    (tests/test_frames.py).
    """
    nodes, table = _observer_table(geocentric, day)
    x = np.array(nodes[first:first + TABLE_ORDER])
    y = np.array(table[first:first + TABLE_ORDER])
    scale = 4.0 / (x.max() - x.min())   # the capacity scaling scipy applies (keeps the products near 1)
    w = np.array([1.0 / np.prod(scale * (x[j] - np.delete(x, j))) for j in range(x.size)])

    def at(frac):
        c = frac - x
        hit = np.flatnonzero(c == 0.0)
        if hit.size:    # on a node: its value
            return y[hit[0]].copy()
        c = w / c
        return np.dot(c, y) / np.sum(c)

    return at


@functools.lru_cache(maxsize=64)
def _observer_table(geocentric, day):
    """(nodes, velocities): the observer's barycentric velocity (m/s, ICRS axes) at a site
    (geocentric x, y, z in m) every :data:`TABLE_STEP` over UTC day ``day`` and a margin of
    :data:`TABLE_ORDER` // 2 nodes either side: astropy's, in one vectorised call per site and day.
    Nodes are fractions of the day."""
    from astropy.coordinates import EarthLocation, get_body_barycentric_posvel
    from astropy.time import Time

    from ._offline import load_earth_orientation

    load_earth_orientation()   # the site's velocity needs Earth orientation: parsed once, then cached on disk
    margin = TABLE_ORDER // 2
    nodes = TABLE_STEP * np.arange(-margin, round(1.0 / TABLE_STEP) + margin + 1)
    times = Time(day + nodes, format="mjd", scale="utc")
    site = EarthLocation.from_geocentric(*geocentric, unit=u.m)
    _, v_earth = get_body_barycentric_posvel("earth", times)
    _, v_site = site.get_gcrs_posvel(times)
    table = np.ascontiguousarray((v_earth.xyz.to_value(u.m / u.s) + v_site.xyz.to_value(u.m / u.s)).T)  # (nodes, 3)
    nodes.flags.writeable = table.flags.writeable = False   # cached, shared
    return nodes, table


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
    coord : astropy.coordinates.SkyCoord or numpy.ndarray
        Direction of the star: a SkyCoord, or its unit vector on ICRS axes (what
        :func:`pointing_direction` gives; no frame transformation per call).

    Returns
    -------
    astropy.units.Quantity
        v_GRF in km/s, with astropy's Galactocentric "v4.0" defaults (solar motion
        Drimmel & Poggio 2018 / Reid & Brunthaler 2004, R0 GRAVITY 2018).
    """
    # astropy's unit vector (a coordinate with a distance too: only its direction counts)
    toward = coord if isinstance(coord, np.ndarray) else coord.icrs.represent_as("unitspherical").to_cartesian().xyz.value
    return (u.Quantity(rv, _KMS).value + sun_motion_toward_kms(toward)) * _KMS


def sun_motion_toward_kms(toward):
    """The Sun's velocity in the Galactic rest frame projected on the ICRS unit vector ``toward``
    (km/s, a float: what :func:`galactic_rest_frame_velocity` adds to a barycentric velocity)."""
    return float(_sun_velocity_icrs() @ toward)

"""specan.frames against astropy: the barycentric correction on many dates, sites and targets."""

import astropy.units as u
import numpy as np
import pytest
from astropy.coordinates import EarthLocation, SkyCoord
from astropy.time import Time

from specan import frames
from specan.obsinfo import ObsInfo

# (longitude deg, latitude deg, height m): sites spread in longitude and latitude (our choice)
SITES = ((-17.88, 28.76, 2396.0), (-70.40, -24.63, 2635.0), (149.07, -31.27, 1165.0), (10.0, 78.2, 20.0),
         (78.96, 32.78, 4500.0))
DATES = ("1999-12-31T23:59:30", "2008-06-21T04:12:00", "2016-02-29T12:00:00", "2021-09-05T22:45:10",
         "2024-03-15T03:12:45")
# (ra, dec, frame, equinox): ICRS and FK5 pointings, near the poles and the ecliptic (our choice)
TARGETS = ((0.0, 0.0, "icrs", None), (83.63, 22.01, "icrs", None), (266.4, -29.0, "fk5", 2000.0),
           (10.7, 89.3, "icrs", None), (201.3, -43.0, "fk5", 1990.0), (300.0, -88.5, "icrs", None))


def _astropy(info):
    return info.coord.radial_velocity_correction(kind="barycentric", obstime=info.time_mid,
                                                 location=info.site).to_value(u.m / u.s)


@pytest.mark.parametrize("site", SITES)
def test_barycentric_correction_agrees_with_astropy(site):
    """Within 1 m/s of ``SkyCoord.radial_velocity_correction`` (the issue's tolerance); measured: 3.7e-4 m/s."""
    loc = EarthLocation.from_geodetic(site[0] * u.deg, site[1] * u.deg, site[2] * u.m)
    worst = 0.0
    for i, date in enumerate(DATES):
        for ra, dec, frame, equinox in TARGETS[i % 2::2]:
            info = ObsInfo(time_mid=Time(date, scale="utc"), ra_deg=ra, dec_deg=dec, radesys=frame,
                           equinox=equinox, site=loc)
            got = frames.barycentric_correction(info).to_value(u.m / u.s)
            ref = _astropy(info)
            assert abs(ref) > 100.0  # a real correction, not a trivial zero
            worst = max(worst, abs(got - ref))
    assert worst < 1.0
    assert worst < 0.01  # what the daily gravitational-redshift term allows (see frames)


def test_barycentric_correction_of_a_coordinate_with_distance_is_astropys():
    """A direction with a distance is astropy's computation whole (parallax of the target)."""
    loc = EarthLocation.from_geodetic(-70.4 * u.deg, -24.6 * u.deg, 2600 * u.m)
    t = Time("2020-01-01T05:00:00", scale="utc")
    c = SkyCoord(30 * u.deg, 10 * u.deg, distance=2 * u.pc)
    got = frames._correction_kms(c, t, loc)
    assert got == c.radial_velocity_correction(kind="barycentric", obstime=t, location=loc).to_value(u.km / u.s)


def test_gravitational_redshift_term_matters():
    """The cached redshift term is in: leaving it out would move the correction by ~3 m/s."""
    loc = EarthLocation.from_geodetic(-17.88 * u.deg, 28.76 * u.deg, 2396 * u.m)
    t = Time("2016-02-29T12:00:00", scale="utc")
    gr = frames._redshift_ms(tuple(float(q.to_value(u.m)) for q in loc.geocentric), int(np.floor(t.mjd)))
    assert gr == pytest.approx(loc.gravitational_redshift(t).to_value(u.m / u.s), abs=1e-3)
    assert 2.0 < abs(gr) < 5.0  # Sun ~2.95 m/s + Earth ~0.21 m/s (from memory)


def test_barycentric_correction_outside_the_iers_tables_is_astropys():
    """Before the bundled IERS tables (astropy warns) the correction still agrees with astropy's."""
    loc = EarthLocation.from_geodetic(-70.4 * u.deg, -24.6 * u.deg, 2600 * u.m)
    t = Time("1958-01-01T00:00:00", scale="utc")
    info = ObsInfo(time_mid=t, ra_deg=30.0, dec_deg=10.0, radesys="icrs", site=loc)
    with pytest.warns(Warning):   # astropy says its IERS tables do not reach back that far
        ref = _astropy(info)
    with pytest.warns(Warning):
        got = frames.barycentric_correction(info).to_value(u.m / u.s)
    assert abs(got - ref) < 0.01


def test_barycentric_correction_through_the_day_agrees_with_astropy():
    """The observer's velocity is interpolated within each UTC day: at times all through the day, and
    on either side of midnight, within 1e-3 m/s of astropy's (measured: 3.7e-4 m/s on 750 cases, the
    daily gravitational-redshift term; the interpolation alone 1e-5 m/s)."""
    worst = 0.0
    for k, site in enumerate(SITES[:3]):
        loc = EarthLocation.from_geodetic(site[0] * u.deg, site[1] * u.deg, site[2] * u.m)
        day = Time(DATES[k], scale="utc")
        midnight = Time(np.floor(day.mjd), format="mjd", scale="utc")
        offsets = np.concatenate([np.linspace(0.0, 1.0, 13)[1:-1] + 0.0123, [-1e-5, 1e-5, 0.99999]])
        for i, dt in enumerate(offsets):
            ra, dec, frame, equinox = TARGETS[i % len(TARGETS)]
            info = ObsInfo(time_mid=midnight + dt * u.day, ra_deg=ra, dec_deg=dec, radesys=frame,
                           equinox=equinox, site=loc)
            worst = max(worst, abs(frames.barycentric_correction(info).to_value(u.m / u.s) - _astropy(info)))
    assert worst < 1e-3


@pytest.mark.parametrize("frame, equinox", (("icrs", None), ("fk5", 2000.0), ("fk5", 1975.0), ("fk4", 1950.0)))
def test_pointing_direction_is_astropys(frame, equinox):
    """The pointing's unit vector (ICRS axes) is ``coord.icrs.cartesian.xyz``, FK5 and FK4 pointings included."""
    for ra, dec, _, _ in TARGETS:
        info = ObsInfo(ra_deg=ra, dec_deg=dec, radesys=frame, equinox=equinox)
        want = info.coord.icrs.cartesian.xyz.value
        got = frames.pointing_direction(info)
        assert np.max(np.abs(got - want)) < 1e-14
        assert frames.pointing_direction(info) is got or frame == "icrs"   # transformed once per pointing


def test_galactic_rest_frame_velocity_agrees_with_astropys_galactocentric_frame():
    """v_GRF = rv + v_sun . n against astropy's own transformation of a star (at 1 pc, no proper motion)
    into the pinned Galactocentric frame, its velocity projected on the Sun-star line: < 1e-6 km/s
    (measured: 6e-11 km/s)."""
    gc = frames.galactocentric_frame()
    worst = 0.0
    for ra, dec, frame, equinox in TARGETS:
        info = ObsInfo(ra_deg=ra, dec_deg=dec, radesys=frame, equinox=equinox)
        c = info.coord
        kwargs = {"equinox": c.equinox} if frame != "icrs" else {}
        for rv in (-420.0, 0.0, 37.5):
            near, star = (SkyCoord(ra=ra * u.deg, dec=dec * u.deg, distance=d * u.pc, pm_ra_cosdec=0 * u.mas / u.yr,
                                   pm_dec=0 * u.mas / u.yr, radial_velocity=rv * u.km / u.s, frame=frame, **kwargs)
                          .transform_to(gc) for d in (1e-6, 1.0))
            line = (star.cartesian.xyz - near.cartesian.xyz).to_value(u.pc)
            line /= np.linalg.norm(line)
            want = float(star.velocity.d_xyz.to_value(u.km / u.s) @ line)
            got = frames.galactic_rest_frame_velocity(rv * u.km / u.s, frames.pointing_direction(info))
            worst = max(worst, abs(got.to_value(u.km / u.s) - want))
            assert got.to_value(u.km / u.s) == pytest.approx(
                frames.galactic_rest_frame_velocity(rv * u.km / u.s, c).to_value(u.km / u.s), abs=1e-9)
    assert worst < 1e-6


@pytest.fixture
def fresh_earth_orientation(tmp_path, monkeypatch):
    """A cache folder of the test's own and no table parsed yet; astropy's table as it was afterwards."""
    from astropy.utils import iers

    before = iers.IERS_Auto.iers_table
    monkeypatch.setenv("SPECAN_CACHE_DIR", str(tmp_path / "cache"))
    iers.IERS_Auto.iers_table = None
    yield tmp_path / "cache"
    iers.IERS_Auto.iers_table = before


def _astropys_own_parse():
    """astropy's parse of its bundled IERS tables, made here without specan."""
    from astropy.utils import iers

    saved, iers.IERS_Auto.iers_table = iers.IERS_Auto.iers_table, None
    try:
        return iers.IERS_Auto.open()
    finally:
        iers.IERS_Auto.iers_table = saved


def test_cached_earth_orientation_is_astropys_table_to_the_bit(fresh_earth_orientation):
    """The table read back from specan's cache has astropy's own parse's numbers, column by column, and
    astropy gives the same site velocity with either (astropy's bundled IERS tables are the reference)."""
    from astropy.utils import iers

    from specan._offline import load_earth_orientation

    parsed = load_earth_orientation()                   # no cache yet: astropy parses, specan keeps it
    files = list(fresh_earth_orientation.glob("iers-*.pickle"))
    assert len(files) == 1
    iers.IERS_Auto.iers_table = None
    cached = load_earth_orientation()                   # read back from the file
    assert cached is not parsed and iers.IERS_Auto.iers_table is cached
    reference = _astropys_own_parse()
    assert cached.colnames == reference.colnames and len(cached) == len(reference) > 10000
    for name in reference.colnames:
        a, b = np.asarray(cached[name]), np.asarray(reference[name])
        assert a.dtype == b.dtype and np.array_equal(a, b, equal_nan=a.dtype.kind == "f"), name
    assert cached.meta["predictive_mjd"] == reference.meta["predictive_mjd"]
    loc = EarthLocation.from_geodetic(-17.88 * u.deg, 28.76 * u.deg, 2396 * u.m)
    t = Time("2021-09-05T22:45:10", scale="utc") + np.arange(5) * u.hour
    with iers.earth_orientation_table.set(reference):
        want = loc.get_gcrs_posvel(t)[1].xyz.to_value(u.m / u.s)
    got = loc.get_gcrs_posvel(t)[1].xyz.to_value(u.m / u.s)
    assert np.array_equal(got, want)
    # and the table matters: polar motion and UT1-UTC set to zero move the site velocity measurably
    zeroed = reference.copy()
    for name in ("UT1_UTC", "PM_x", "PM_y"):
        zeroed[name] = 0 * zeroed[name]
    with iers.earth_orientation_table.set(zeroed):
        assert not np.array_equal(loc.get_gcrs_posvel(t)[1].xyz.to_value(u.m / u.s), want)


def test_broken_earth_orientation_cache_is_parsed_again(fresh_earth_orientation):
    """A truncated or foreign cache file costs the parse, not the run, and is replaced by a good one."""
    import pickle

    from astropy.utils import iers

    from specan._offline import load_earth_orientation

    load_earth_orientation()
    (path,) = fresh_earth_orientation.glob("iers-*.pickle")
    for junk in (path.read_bytes()[:1000], pickle.dumps({"not": "a table"})):
        path.write_bytes(junk)
        iers.IERS_Auto.iers_table = None
        table = load_earth_orientation()
        assert isinstance(table, iers.IERS_Auto) and len(table) > 10000
        assert isinstance(pickle.loads(path.read_bytes()), iers.IERS_Auto)


def test_earth_orientation_cache_can_be_turned_off_or_unwritable(fresh_earth_orientation, monkeypatch, tmp_path):
    """SPECAN_CACHE_DIR="" writes nothing; a cache folder that cannot be made is left alone, the table still parsed."""
    from astropy.utils import iers

    from specan._offline import cache_dir, load_earth_orientation

    monkeypatch.setenv("SPECAN_CACHE_DIR", "")
    assert cache_dir() is None
    assert len(load_earth_orientation()) > 10000
    blocker = tmp_path / "a_file"
    blocker.write_text("not a folder")
    monkeypatch.setenv("SPECAN_CACHE_DIR", str(blocker / "cache"))
    iers.IERS_Auto.iers_table = None
    assert len(load_earth_orientation()) > 10000
    assert blocker.read_text() == "not a folder" and not fresh_earth_orientation.exists()


def test_observer_velocity_is_scipys_interpolation_and_the_same_bits_whatever_the_random_state():
    """The observer's velocity between the table's nodes: scipy's ``barycentric_interpolate`` (the outside
    reference) within 1e-10 m/s, and the same bits whatever numpy's global random state (scipy's own
    draws a random order of the weights' factors from it)."""
    from scipy.interpolate import barycentric_interpolate

    geo = frames._geocentric_m(EarthLocation.from_geodetic(-17.88 * u.deg, 28.76 * u.deg, 2330 * u.m))
    day = 61000
    nodes, table = frames._observer_table(geo, day)
    fracs = np.random.default_rng(3).uniform(0.0, 1.0, 400)
    worst = 0.0
    runs = []
    state = np.random.get_state()   # (given back: other tests keep the state they had)
    try:
        for seed in (1, 2):
            np.random.seed(seed)
            frames._interpolant.cache_clear()   # weights made again under each state
            runs.append(np.array([frames._observer_velocity_ms(geo, day, f) for f in fracs]))
    finally:
        np.random.set_state(state)
    for got in runs:
        for f, v in zip(fracs, got):
            first = int(np.floor((f - nodes[0]) / frames.TABLE_STEP)) - (frames.TABLE_ORDER // 2 - 1)
            first = min(max(first, 0), nodes.size - frames.TABLE_ORDER)
            ref = barycentric_interpolate(nodes[first:first + frames.TABLE_ORDER],
                                          table[first:first + frames.TABLE_ORDER], f, axis=0)
            worst = max(worst, float(np.abs(v - ref).max()))
    assert worst < 1e-10
    assert np.array_equal(runs[0], runs[1])
    # on a node: the table's own value
    assert np.array_equal(frames._observer_velocity_ms(geo, day, float(nodes[10])), table[10])

"""Make astropy work offline: nothing in specan may download at run time."""

import warnings

#: Said in outputs whose precision depends on Earth-orientation data.
IERS_NOTE = (
    "Earth orientation from astropy's bundled IERS tables (no download); barycentric "
    "corrections are good to a few cm/s within the tables' span, and UT1-UTC beyond it "
    "is taken as 0 (error below 1 m/s for velocities)"
)


def configure_offline():
    """Set astropy's data and IERS configuration so that nothing is fetched."""
    from astropy.utils import data as _data
    from astropy.utils import iers

    _data.conf.allow_internet = False
    iers.conf.auto_download = False
    iers.conf.auto_max_age = None
    # Beyond the bundled table's span astropy would otherwise raise; a velocity
    # error of far below 1 m/s does not justify failing a night's reduction.
    iers.conf.iers_degraded_accuracy = "warn"
    warnings.filterwarnings("ignore", message=".*(IERS|leap-second|dubious year).*")

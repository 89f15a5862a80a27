"""specan's exception hierarchy.

Every problem specan can diagnose in its input is a :class:`SpecanError`, so a
batch run can record the message for one file and carry on with the next.
Messages are one line: what is wrong, where, and how to fix it.
"""

__all__ = [
    "SpecanError",
    "ReadError",
    "EmptyFileError",
    "CorruptFileError",
    "NoWavelengthError",
    "NonMonotonicError",
    "UnitError",
    "MetadataError",
    "AnalysisError",
]


class SpecanError(Exception):
    """Base class of every error specan raises about its input or settings."""

    def __init__(self, message, path=None):
        self.path = None if path is None else str(path)
        self.reason = message
        super().__init__(f"{self.path}: {message}" if self.path else message)


class ReadError(SpecanError):
    """A file could not be read as a spectrum."""


class EmptyFileError(ReadError):
    """The file holds no data."""


class CorruptFileError(ReadError):
    """The file is truncated or not what its name says."""


class NoWavelengthError(ReadError):
    """No wavelength axis could be found or built."""


class NonMonotonicError(ReadError):
    """The wavelength axis does not increase (or decrease) monotonically."""


class UnitError(ReadError):
    """A unit is missing or cannot be understood."""


class MetadataError(SpecanError):
    """Header metadata is present but inconsistent or unreadable."""


class AnalysisError(SpecanError):
    """A stage could not produce a result for this spectrum (too little data, no lines...)."""

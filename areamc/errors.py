"""Exceptions raised by areamc.

Every error that comes from bad input derives from :class:`InputError`; the
command line turns it into a one-line message on stderr and exit status 2.
"""

from __future__ import annotations

__all__ = [
    "AreamcError",
    "InputError",
    "LayerError",
    "CRSError",
    "NotEqualAreaError",
    "OptionError",
]


class AreamcError(Exception):
    """Base class of every error areamc raises on purpose."""

    exit_status = 1


class InputError(AreamcError):
    """Raised when a file, a feature or an option cannot be used as given."""

    exit_status = 2


class LayerError(InputError):
    """Raised when a vector file or layer is missing, unreadable or holds no usable features."""


class CRSError(InputError):
    """Raised when a coordinate reference system is missing, unknown or unusable."""


class NotEqualAreaError(CRSError):
    """Raised when a requested plane distorts areas over the data's extent."""


class OptionError(InputError):
    """Raised when an option's value is out of range or of the wrong kind."""

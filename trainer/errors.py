"""The one exception type for user mistakes (defined in :mod:`service.errors`, so that the
runtime's own checks raise it too); the command line turns it into one line and exit 2."""

from service.errors import UserError

__all__ = ["UserError"]

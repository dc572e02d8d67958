"""The one exception type the command line turns into a one-line message and exit code."""


class UserError(Exception):
    """Something the user can fix (bad input, bad option); shown without a traceback."""

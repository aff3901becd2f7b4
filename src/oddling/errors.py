"""The exception and warning types every floor raises: the CLI prints their message (errors exit 2), no traceback."""


class OddlingError(Exception):
    """A problem the user can fix (bad input, missing file, incompatible bank)."""


class OddlingWarning(UserWarning):
    """Something the user should know but that does not stop the job."""

"""The one exception type for user mistakes: the CLI prints its message and exits 2, no traceback."""


class OddlingError(Exception):
    """A problem the user can fix (bad input, missing file, incompatible bank)."""

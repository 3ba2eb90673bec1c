"""The package's one error class for bad files and data."""


class DataError(ValueError):
    """Raised for a bad input file or data set.

    The message names the file, the field (and row where it applies) and what would fix it,
    so the command line can print it as one line.
    """

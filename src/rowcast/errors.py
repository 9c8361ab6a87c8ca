"""The two kinds of failure a user sees, each with a one-line message naming the file."""


class RowcastError(Exception):
    """Base of every error rowcast reports to a user; `exit_code` is what the CLI returns."""

    exit_code = 1


class DataError(RowcastError):
    """The data is wrong: an unreadable or unsupported image, a corrupt archive, a mismatch."""

    exit_code = 1


class UsageError(RowcastError):
    """The request is wrong: a missing path, an output that exists, the wrong model."""

    exit_code = 2

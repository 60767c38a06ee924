"""User-facing errors.

Anything a user can cause (bad config, an unreadable file, a bad flag) is raised as
`AftercastError` with one line that names the file, row or config key; the command line prints
that line and exits non-zero instead of showing a traceback.
"""


class AftercastError(Exception):
    """An error the user can fix; its message is one line naming the file, row or key."""


class ConfigError(AftercastError):
    """The configuration file or a value in it is wrong."""


class InputFileError(AftercastError):
    """An input file cannot be read at all (nothing from it was kept)."""


class SchemaOutdatedError(AftercastError):
    """The store's schema is older than this version of aftercast."""

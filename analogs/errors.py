"""Exceptions the command line turns into exit status 2 with one clear line."""


class AnalogsInputError(ValueError):
    """Bad input: a file, variable, option or value that cannot be used.

    The message names what is wrong (the file, the variable or the option) and
    what was expected, on one line, so the CLI can print it as it is.
    """


class StoreError(AnalogsInputError):
    """A store directory that is missing, incomplete, altered or of another version."""


class NotFittedError(AnalogsInputError, AttributeError):
    """An estimator was used before ``fit``."""

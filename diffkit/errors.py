"""One exception tree and one warning class for the whole package.

Exceptions are for bad input and misuse only. A result that is only partly
defined (too few hops, no diffusive window) is returned with its flags and a
message instead of raising.
"""

__all__ = [
    "DiffkitError",
    "InputError",
    "UnitsError",
    "FitError",
    "UsageError",
    "DiffkitWarning",
]


class DiffkitError(Exception):
    """Base class of every exception diffkit raises on purpose."""


class InputError(DiffkitError, ValueError):
    """A file or an argument does not hold what was expected.

    Messages name the file, the frame or line, and what was expected.
    """


class UnitsError(InputError):
    """A quantity carries a unit diffkit cannot convert, or none where one is needed."""


class FitError(DiffkitError):
    """A fit was asked of data that cannot support it (misuse, not bad luck)."""


class UsageError(DiffkitError, ValueError):
    """An option or combination of options makes no sense."""


class DiffkitWarning(UserWarning):
    """Something worth knowing happened, but the result is still usable."""

"""Errors and warnings raised by probeseq.

Every error meant for a user derives from :class:`ProbeseqError`; bad input raises
:class:`InputError`, which is also a :class:`ValueError` so ``except ValueError`` still works.
The CLI prints the message of a :class:`ProbeseqError` as one line and exits non-zero.
Messages name what was wrong and where (file, line, parameter), what was expected and what came.
"""


__all__ = ['ProbeseqError', 'InputError', 'FitError', 'ProbeseqWarning', 'DataQualityWarning', 'ConvergenceWarning']

class ProbeseqError(Exception):
    """Base class of every error probeseq reports to a user."""


class InputError(ProbeseqError, ValueError):
    """An input file, parameter or data set is malformed or unusable."""


class FitError(ProbeseqError, RuntimeError):
    """A fit could not be carried out on otherwise valid input."""


class ProbeseqWarning(UserWarning):
    """Base class of probeseq's warnings."""


class DataQualityWarning(ProbeseqWarning):
    """The data are usable but something in them weakens the result (rows dropped, low counts)."""


class ConvergenceWarning(ProbeseqWarning):
    """An iterative fit stopped at its iteration limit before meeting its tolerance."""

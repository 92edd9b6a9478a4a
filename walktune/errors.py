"""Errors that walktune raises for bad input or failed runs.

Every message is one line that says what is wrong and how to fix it; the
command-line layer prints it as it is, without a traceback.
"""

from __future__ import annotations


class WalktuneError(ValueError):
    """Bad input or a run that cannot go on; the message is meant for the user."""


class TargetError(WalktuneError):
    """The user's log-density could not be loaded or evaluated at the start."""


class SamplingError(WalktuneError):
    """Too many evaluations of the log-density failed during sampling.

    Attributes
    ----------
    first_failure : str or None
        The traceback (or description) of the first failed evaluation.
    """

    def __init__(self, message: str, first_failure: str | None = None):
        super().__init__(message)
        self.first_failure = first_failure


class NumericalFailure(SamplingError):
    """A numerical failure inside the tuning job (NaN, overflow, a singular matrix) that no stage could absorb.

    The stages turn the failures they expect into findings; this is the net
    under them, so that the user sees one line naming the stage, never a
    traceback (the original exception is kept as ``__cause__``).
    """

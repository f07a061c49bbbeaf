"""Errors that reach the user as one clear line.

`InputError` and `RuntimeProblem` exit with status 1; `UsageProblem` with 2.
Everything the CLI catches is printed as ``skewfix: <message>`` with no
traceback (unless ``--debug``).
"""


class SkewfixError(Exception):
    """Base of every error meant for the user. ``exit_code`` is the status."""

    exit_code = 1


class InputError(SkewfixError):
    """The input cannot be read or does not hold what the command needs."""


class RuntimeProblem(SkewfixError):
    """The job started but could not be finished (nothing was written)."""


class UsageProblem(SkewfixError):
    """The command line is wrong (bad value, conflicting options)."""

    exit_code = 2


class MeasurementRefused(SkewfixError):
    """A readout measurement that the clip cannot support; says why."""

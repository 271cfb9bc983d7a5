"""The errors trophoscape raises on purpose.

``InputError`` is a problem with what the user handed over (a patch file, a scenario, a
links table); the command line prints its one-line message and exits with code 2.
``RunError`` is a failure of the computation itself (a solver that gives up); exit code 1.
"""

from __future__ import annotations

__all__ = ["TrophoscapeError", "InputError", "RunError", "TrophoscapeWarning", "Terminated",
           "allowed_range", "note_stop", "raise_if_stopped", "clear_stop"]


class TrophoscapeError(Exception):
    """Base class of every error raised on purpose by trophoscape."""


class InputError(TrophoscapeError, ValueError):
    """Bad input: names the file, the feature and the field where they are known.

    Parameters
    ----------
    message : str
        What is wrong and what would be accepted.
    file : str or path, optional
        The file the problem is in.
    feature : str or int, optional
        The feature: its id (str) where the file has an id field, else its 0-based position.
    field : str, optional
        The attribute, column or scenario key.

    Examples
    --------
    >>> str(InputError("must be >= 0, got -1", file="p.geojson", feature="W3", field="quality"))
    "p.geojson: feature 'W3': field 'quality': must be >= 0, got -1"
    """

    def __init__(self, message: str, *, file=None, feature=None, field=None):
        self.message = message
        self.file = None if file is None else str(file)
        self.feature = feature
        self.field = field
        parts = []
        if self.file is not None:
            parts.append(self.file)
        if feature is not None:
            parts.append(f"feature {feature!r}" if isinstance(feature, str) else f"feature {feature}")
        if field is not None:
            parts.append(f"field {field!r}")
        parts.append(message)
        super().__init__(": ".join(parts))


class RunError(TrophoscapeError, RuntimeError):
    """The computation failed (for example the ODE solver gave up)."""


class Terminated(KeyboardInterrupt):
    """The process was asked to stop (SIGTERM). Raised like Ctrl-C, so that everything
    half-written is removed on the way out; the command line then exits with 143."""

    exit_code = 143


#: The stop signals received during the current command (KeyboardInterrupt or Terminated).
_STOPS: list = []


def note_stop(kind: type) -> None:
    """Record that the process was asked to stop: a KeyboardInterrupt raised where Python
    ignores exceptions (a weakref callback, a ``__del__``) is otherwise lost."""
    _STOPS.append(kind)


def raise_if_stopped() -> None:
    """Raise the recorded stop, if any: called before an output is put in place and when
    a command ends, so that a swallowed Ctrl-C still stops it."""
    if _STOPS:
        raise _STOPS[-1]()


def clear_stop() -> None:
    _STOPS.clear()


class TrophoscapeWarning(UserWarning):
    """Warnings about input that was accepted but changed."""


def allowed_range(lo=None, hi=None, lo_open=False, *, integer=False) -> str:
    """The accepted values in words: "a number from 0 to 1", "a whole number of at least 1"."""
    what = "a whole number" if integer else "a number"
    if lo is not None and hi is not None:
        return f"{what} from {lo:g} to {hi:g}" if not lo_open else \
            f"{what} above {lo:g} and at most {hi:g}"
    if lo is not None:
        return f"{what} above {lo:g}" if lo_open else f"{what} of at least {lo:g}"
    if hi is not None:
        return f"{what} of at most {hi:g}"
    return what

"""The errors trophoscape raises on purpose.

``InputError`` is a problem with what the user handed over (a patch file, a scenario, a
links table); the command line prints its one-line message and exits with code 2.
``RunError`` is a failure of the computation itself (a solver that gives up); exit code 1.
"""

from __future__ import annotations

import re

__all__ = ["TrophoscapeError", "InputError", "RunError", "TrophoscapeWarning", "Terminated",
           "allowed_range", "param", "render_params", "note_stop", "raise_if_stopped", "clear_stop"]


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
        super().__init__(self.render())

    def render(self, flags=None) -> str:
        """The one-line message. Parameters named with :func:`param` read as Python
        (``out``, ``resume=True``), or, given ``flags`` (parameter name -> command-line
        option), as the command line's options (``--out``, ``--resume``)."""
        parts = []
        if self.file is not None:
            parts.append(self.file)
        feature = self.feature
        if feature is not None:
            parts.append(f"feature {feature!r}" if isinstance(feature, str) else f"feature {feature}")
        if self.field is not None:
            field = str(self.field)
            if _PARAM.search(field):
                shown = _PARAM.sub(lambda m: _shown(m, flags, bare=True), field)
                parts.append(f"field {shown!r}" if flags is not None else f"parameter {shown!r}")
            else:
                parts.append(f"field {self.field!r}")
        parts.append(render_params(self.message, flags))
        return ": ".join(parts)

    def __str__(self) -> str:
        return self.render()

    def __reduce__(self):  # across processes (a pool or Dask worker) with its parts whole
        return (_input_error, (self.message, self.file, self.feature, self.field))


def _input_error(message, file, feature, field) -> InputError:
    return InputError(message, file=file, feature=feature, field=field)


_OPEN, _CLOSE, _SET = "\ue000", "\ue001", "\ue002"
_PARAM = re.compile(f"{_OPEN}([A-Za-z_][A-Za-z0-9_]*)(?:{_SET}([^{_CLOSE}]*))?{_CLOSE}")


def param(name: str, value=None) -> str:
    """A parameter of a public call, named in a message: ``out`` (or ``out='results'``) in
    Python, ``--out`` (or ``--out results``) on the command line, which maps the names to
    its options in one table (``trophoscape.cli.program.FLAGS``).

    ``value`` True names a switch: ``resume=True`` in Python, ``--resume`` on the command
    line. Any other value is an example: ``out='results'`` / ``--out results``.
    """
    if value is None:
        return f"{_OPEN}{name}{_CLOSE}"
    return f"{_OPEN}{name}{_SET}{'' if value is True else value}{_CLOSE}"


def _shown(match, flags, bare=False) -> str:
    name, value = match.group(1), match.group(2)
    if flags is not None:
        flag = flags.get(name, name)  # every parameter has its entry (tests/test_errors_cli.py)
        return flag if bare or not value else f"{flag} {value}"
    if bare or value is None:
        return name
    return f"{name}=True" if value == "" else f"{name}={value!r}"


def render_params(text: str, flags=None) -> str:
    """``text`` with every :func:`param` reference written for Python (``flags`` None) or
    for the command line (``flags``: parameter name -> option)."""
    return _PARAM.sub(lambda m: _shown(m, flags), str(text))


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

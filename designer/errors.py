"""User-facing errors: one clear message naming the file, key and value.

The CLI turns any :class:`SpecError` into a single line on stderr and exit code 2,
without a traceback.  Numerical code raises ``ValueError`` subclasses of its own;
the spec layer translates what a user can fix into ``SpecError``.
"""

from __future__ import annotations

_MISSING = object()


def short_repr(value, limit: int = 120) -> str:
    """``repr`` of a value cut to about ``limit`` characters (a huge list in a spec is
    named by its start, not printed whole)."""
    import reprlib

    r = reprlib.Repr()
    r.maxlist = r.maxtuple = r.maxdict = r.maxset = 6
    r.maxstring = r.maxother = 60
    r.maxlevel = 3
    text = r.repr(value)
    return text if len(text) <= limit else text[:limit - 3] + "..."


class VelomatchError(Exception):
    """Base of every error the CLI reports as a message (exit code 2)."""

    exit_code = 2


class SpecError(VelomatchError):
    """A problem in a spec file, located by file, dotted key and offending value.

    ``str(err)`` reads ``FILE: KEY = VALUE: MESSAGE`` (the value part omitted when
    the key is missing).
    """

    def __init__(self, source: str, key: str | None, message: str, value=_MISSING):
        self.source = source
        self.key = key
        self.value = value
        self.message = message
        super().__init__(self.__str__())

    def __str__(self) -> str:
        where = self.source
        if self.key:
            where += f": {self.key}"
            if self.value is not _MISSING:
                where += f" = {short_repr(self.value)}"
        return f"{where}: {self.message}"


class UsageError(VelomatchError):
    """Bad command-line use that argparse cannot catch (e.g. an existing output dir)."""


class NumericalError(VelomatchError):
    """A solve that produced NaN or infinity: the command fails instead of reporting it."""

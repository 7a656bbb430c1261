"""Errors that reach the user as one clear line.

Every problem with what the user gave us (a model file, a series file, a spectrum file, a command-line
option) is raised as :class:`InputError`.  The command line prints ``str(error)`` on one line and exits
with status 2; Python callers can catch it like any other exception.
"""
from __future__ import annotations

import difflib
from collections.abc import Iterable
from pathlib import Path


class InputError(ValueError):
    """Bad input: names the file, the place in it, what is wrong and (where possible) how to fix it.

    Parameters
    ----------
    message : str
        What is wrong and what to do about it.
    source : str or Path, optional
        The file the problem is in.
    where : str, optional
        The key (``state[2].shifts_ppm``), line (``line 14``) or option (``--barrier-kj-mol``).
    """

    def __init__(self, message: str, source: str | Path | None = None, where: str | None = None):
        self.message = message
        self.source = None if source is None else str(source)
        self.where = where
        super().__init__(self.__str__())

    def __str__(self) -> str:
        parts = [p for p in (self.source, self.where) if p]
        text = " ".join(self.message.split())  # always one line
        return ": ".join(parts + [text])

    def located(self, source: str | Path | None = None, where: str | None = None) -> "InputError":
        """Return a copy that also names the file and/or place (keeps what is already known)."""
        return InputError(self.message, self.source or source, self.where or where)


def did_you_mean(word: str, choices: Iterable[str]) -> str:
    """A ' (did you mean "x"?)' hint for a misspelt key, or '' when nothing is close."""
    close = difflib.get_close_matches(word, list(choices), n=1, cutoff=0.6)
    return f' (did you mean "{close[0]}"?)' if close else ""

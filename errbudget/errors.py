"""The one exception family for problems the user can fix (exit code 2)."""

from __future__ import annotations

import difflib
from collections.abc import Iterable


class InputError(Exception):
    """Bad input: a case file, a counts file or an option the user can correct.

    Parameters
    ----------
    message : str
        What is wrong and what would be accepted.
    source : str, optional
        The file (or option) the problem is in.
    where : str, optional
        The key, line or row inside ``source``.
    """

    def __init__(self, message: str, source: str | None = None, where: str | None = None):
        self.message = message
        self.source = source
        self.where = where
        super().__init__(self.format())

    def format(self) -> str:
        place = ", ".join(part for part in (self.source, self.where) if part)
        return f"{place}: {self.message}" if place else self.message

    def located(self, source: str | None = None, where: str | None = None) -> InputError:
        """Return a copy that names ``source``/``where`` where they were not yet known."""
        return type(self)(self.message, self.source or source, self.where or where)


def did_you_mean(word: str, choices: Iterable[str]) -> str:
    """A ' (did you mean "x"?)' hint, or an empty string when nothing is close."""
    close = difflib.get_close_matches(word, list(choices), n=1, cutoff=0.6)
    return f' (did you mean "{close[0]}"?)' if close else ""

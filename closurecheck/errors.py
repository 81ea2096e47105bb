"""The one error type for bad input, the exit codes the CLI maps to, and how values are shown in messages."""

from __future__ import annotations

EXIT_OK = 0
EXIT_INTERNAL = 1
EXIT_BAD_INPUT = 2

# Characters of one value quoted in an error message (a repr), and of a whole
# problem text: a message stays one readable line whatever the input holds
# (a 20 MB cell of a CSV file, a megabyte-long JSON token).
VALUE_CHARS = 60
PROBLEM_CHARS = 500


def shorten(text, limit: int = PROBLEM_CHARS) -> str:
    """``text`` on one line (whitespace runs become one space), cut to about ``limit`` characters.

    A cut text ends with ``...`` and says how long the whole was, so the
    reader knows the value was not shown in full.

    Examples
    --------
    >>> shorten("two\\nlines")
    'two lines'
    >>> shorten("x" * 1000, limit=10)
    'xxxxxxxxxx... (1000 characters)'
    """
    text = str(text)
    if len(text) > 4 * limit:
        # Collapsing whitespace of a huge text costs its size; only the head is shown anyway.
        total = len(text)
        return " ".join(text[: 2 * limit].split())[:limit] + f"... ({total} characters)"
    one = " ".join(text.split())
    return one if len(one) <= limit else one[:limit] + f"... ({len(one)} characters)"


def show(value, limit: int = VALUE_CHARS) -> str:
    """``repr(value)`` for an error message, cut to about ``limit`` characters (see :func:`shorten`).

    Examples
    --------
    >>> show("1.5")
    "'1.5'"
    >>> show("a" * 100, limit=8)
    "'aaaaaaa... (102 characters)"
    """
    if isinstance(value, (str, bytes)) and len(value) > 4 * limit:
        # repr of a huge string would copy all of it; the head is all that is shown.
        head = shorten(repr(value[: 2 * limit]), limit)
        return head.split("... (")[0] + f"... ({len(value) + 2} characters)"
    return shorten(repr(value), limit)


class InputError(ValueError):
    """Bad input from a user: a file, an option or an array at the public API.

    The message is one line: ``path:line: problem`` when the place is known.
    The problem text is cut to :data:`PROBLEM_CHARS` characters
    (:func:`shorten`); values inside it should be quoted with :func:`show`.
    """

    def __init__(self, problem: str, path=None, line: int | None = None):
        self.problem = shorten(problem)
        self.path = None if path is None else shorten(path)
        self.line = line
        super().__init__(self._format())

    def _format(self) -> str:
        where = ""
        if self.path is not None:
            where = self.path if self.line is None else f"{self.path}:{self.line}"
            where += ": "
        elif self.line is not None:
            where = f"line {self.line}: "
        return where + self.problem

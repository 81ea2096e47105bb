"""The one error type for bad input, the exit codes the CLI maps to, and how a bad value is quoted."""

from __future__ import annotations

EXIT_OK = 0
EXIT_INTERNAL = 1
EXIT_BAD_INPUT = 2
# The run finished and wrote its outputs, but its own checks found the map
# doubtful (summary.json "trust"; docs/cli.md, "Exit status").
EXIT_DOUBTFUL = 3

# A value quoted in an error message is cut to this many characters: a
# message stays one readable line even when the value is a 20 MB string.
QUOTE_MAX_CHARS = 60
# A whole problem text (an exception's message, a long list of names) is cut
# to this many characters, whatever check produced it.
PROBLEM_MAX_CHARS = 500


def shorten(value, limit: int = QUOTE_MAX_CHARS) -> str:
    """``repr(value)`` cut to ``limit`` characters with the original length said.

    Examples
    --------
    >>> shorten("huber")
    "'huber'"
    >>> shorten("x" * 1000, limit=12)
    "'xxxxxxxxxx... (1002 characters)"
    """
    if isinstance(value, (str, bytes)) and len(value) > 4 * limit:
        # The repr of a huge string would copy all of it; only its head is shown.
        text, total = repr(value[: 2 * limit]), len(repr(value[:1])) + len(value) - 1
    else:
        text = repr(value)
        total = len(text)
    if total <= limit:
        return text
    return f"{text[:limit - 1]}... ({total} characters)"


def one_line(text, limit: int = PROBLEM_MAX_CHARS) -> str:
    """Free text (an exception's message) on one line, cut to ``limit`` characters with the length said.

    Whitespace runs, line breaks included, become one space.

    Examples
    --------
    >>> one_line("two\\nlines")
    'two lines'
    >>> one_line("x" * 1000, limit=10)
    'xxxxxxxxxx... (1000 characters)'
    """
    text = str(text)
    if len(text) > 4 * limit:
        # Collapsing the whitespace of a huge text costs its size; only its head is shown.
        return " ".join(text[: 2 * limit].split())[:limit] + f"... ({len(text)} characters)"
    flat = " ".join(text.split())
    return flat if len(flat) <= limit else flat[:limit] + f"... ({len(flat)} characters)"


class InputError(ValueError):
    """Bad input from a user: a file, an option or an array at the public API.

    The message is one line: ``path:line: problem`` when the place is known.
    The problem is cut to :data:`PROBLEM_MAX_CHARS` characters
    (:func:`one_line`), whatever a check put into it; values inside it
    should be quoted with :func:`shorten`.
    """

    def __init__(self, problem: str, path=None, line: int | None = None):
        self.problem = one_line(problem)
        self.path = None if path is None else one_line(path)
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

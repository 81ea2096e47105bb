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


def shorten(value, limit: int = QUOTE_MAX_CHARS) -> str:
    """``repr(value)`` cut to ``limit`` characters with the original length said.

    Examples
    --------
    >>> shorten("huber")
    "'huber'"
    >>> shorten("x" * 1000, limit=12)
    "'xxxxxxxxxx... (1002 characters)"
    """
    text = repr(value)
    if len(text) <= limit:
        return text
    return f"{text[:limit - 1]}... ({len(text)} characters)"


class InputError(ValueError):
    """Bad input from a user: a file, an option or an array at the public API.

    The message is one line: ``path:line: problem`` when the place is known.
    """

    def __init__(self, problem: str, path=None, line: int | None = None):
        self.problem = " ".join(str(problem).split())
        self.path = None if path is None else str(path)
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

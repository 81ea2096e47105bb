"""The one error type for bad input, and the exit codes the CLI maps to."""

from __future__ import annotations

EXIT_OK = 0
EXIT_INTERNAL = 1
EXIT_BAD_INPUT = 2


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

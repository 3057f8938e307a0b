"""One error type for problems the user can fix, and the exit codes the CLI maps them to."""

from __future__ import annotations

from stagewatch.escape import terminal
from stagewatch.wording import cap

# Exit codes, documented in the README.
EXIT_OK = 0
EXIT_FINDINGS = 1  # lint findings; warn, insufficient or not-measured data checks
EXIT_USAGE = 2  # unreadable or invalid input, bad usage
EXIT_INTERNAL = 3  # a bug in stagewatch
EXIT_CRITICAL = 4  # a data check found a critical change
EXIT_INTERRUPTED = 130


class StagewatchError(Exception):
    """A problem in what the user gave us, with where it is and what was expected.

    ``str(error)`` reads ``file:line: message (expected: ...)``.
    """

    exit_code = EXIT_USAGE

    def __init__(
        self,
        message: str,
        *,
        file: str | None = None,
        line: int | None = None,
        expected: str | None = None,
    ) -> None:
        super().__init__(message)
        self.message = message
        self.file = file
        self.line = line
        self.expected = expected

    def described(self) -> str:
        """The message with what was expected, which belongs to the first problem: when further problems follow
        on their own lines (``also file:line: ...``), it goes at the end of the first line, not after the last."""
        if not self.expected:
            return self.message
        first, newline, rest = self.message.partition("\n")
        return f"{first} (expected: {self.expected}){newline}{rest}"

    def __str__(self) -> str:
        where = ""
        if self.file:
            where = f"{self.file}:{self.line}: " if self.line else f"{self.file}: "
        # Messages quote what the user wrote: escape codes and bidi overrides are shown, not obeyed.
        return terminal(cap(f"{where}{self.described()}"))

"""The exception tree. Each class says when it is raised; the CLI maps each to an exit code.

    RatebookError                 base of everything ratebook raises on purpose
    ├── ConfigError               the YAML or the command line is wrong (exit 2)
    │   └── ExpressionError       a universe/condition expression is not in the safe language (exit 2)
    ├── InputDataError            the input data cannot be used: schema broken, unreadable, empty,
    │                             a broken geography lookup, or more rejected rows than allowed (exit 3)
    ├── ReleaseRefused            the release exists and --replace was not given, another run holds
    │                             the lock, or the disclosure audit failed (exit 4)
    └── PublishError              a release file cannot be written: disk full, no permission (exit 1)

Anything else escaping is a bug: exit 1.
"""

from __future__ import annotations


class RatebookError(Exception):
    """Base class. `problems` holds one line per problem, so several can be reported at once."""

    exit_code = 1

    def __init__(self, message: str, problems: list[str] | tuple[str, ...] = ()):
        super().__init__(message)
        self.message = message
        self.problems = list(problems)

    def __str__(self) -> str:
        if not self.problems:
            return self.message
        return self.message + "\n" + "\n".join(f"  - {p}" for p in self.problems)


class ConfigError(RatebookError):
    """Raised when the config file or the command line is wrong."""

    exit_code = 2


class ExpressionError(ConfigError):
    """Raised when an expression uses anything outside the safe expression language."""


class InputDataError(RatebookError):
    """Raised when the input data fails validation as a whole (not row by row)."""

    exit_code = 3


class ReleaseRefused(RatebookError):
    """Raised when a release may not be written: it exists, the output is locked, or the audit failed."""

    exit_code = 4


class PublishError(RatebookError):
    """Raised when a release file cannot be written (disk full, no permission)."""

    exit_code = 1

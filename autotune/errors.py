"""Errors a user can meet: one-line reason, exit code; the CLI prints them without a traceback."""

from __future__ import annotations


class UserError(Exception):
    """A failure with an actionable one-line reason; `exit_code` is what the process returns."""

    def __init__(self, message: str, exit_code: int = 2) -> None:
        super().__init__(message)
        self.exit_code = exit_code


class ConfigError(UserError):
    """Bad configuration: names the file, the key and the problem."""

    def __init__(self, path: str, key: str | None, problem: str) -> None:
        where = f"{path}: {key}: " if key else f"{path}: "
        super().__init__(where + problem, exit_code=2)
        self.path, self.key, self.problem = path, key, problem


# Exit codes shared by the verbs (documented in the README).
EXIT_OK = 0
EXIT_FAILED = 1  # the run ended on a limit, a fault or a failed check
EXIT_USAGE = 2  # bad arguments, configuration or input file
EXIT_ABORTED = 3  # the operator pressed an abort key
EXIT_LINK = 4  # the serial link could not be opened or was lost
EXIT_UNSAFE = 5  # the device did not confirm zero output: cut power

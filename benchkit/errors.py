"""Errors that reach the operator as one clear line and a known exit code."""

from __future__ import annotations

EXIT_OK = 0
EXIT_FAILED = 1  # the job ran and its answer is "no" (nonconforming) or it was aborted
EXIT_BAD_INPUT = 2  # bad file, bad value, instrument not reachable before anything ran
EXIT_UNDECIDED = 3  # verification could not decide


class UserError(Exception):
    """Bad input or an unusable setup: print `message` alone, exit with `exit_code`.

    The message says what is wrong, where (file and line or field), and what to do.
    Raise it before anything is written or any voltage is applied.
    """

    exit_code = EXIT_BAD_INPUT

    def __init__(self, message: str, exit_code: int | None = None):
        super().__init__(message)
        if exit_code is not None:
            self.exit_code = exit_code


class RunAborted(Exception):
    """A sweep stopped before its plan was done; the bias is already off when raised."""

    exit_code = EXIT_FAILED

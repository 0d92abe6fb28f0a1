"""Errors a user can act on: each names the key or file and the rule it broke.

The command line prints them as one paragraph without a traceback and exits with
the error's own status, so scripts can tell bad input from a failed run.
"""


class ScaledrillError(Exception):
    """Base class; `exit_code` is the process status the command line returns."""

    exit_code = 1


class ConfigError(ScaledrillError):
    """A configuration value breaks a rule. Raised before any process starts."""

    exit_code = 2

    def __init__(self, key: str, rule: str, value=None):
        self.key, self.rule, self.value = key, rule, value
        shown = "" if value is None else f" (got {value!r})"
        super().__init__(f"{key}: {rule}{shown}")


class DataError(ScaledrillError):
    """The data cannot serve the run (too small, non-finite values, ...)."""

    exit_code = 3


class CheckpointError(ScaledrillError):
    """A checkpoint is missing, truncated, corrupted or from another run shape."""

    exit_code = 4


class WorkerFailed(ScaledrillError):
    """One of the processes of a run died; the message names the rank."""

    exit_code = 5


class ReportedByRank(ScaledrillError):
    """A rank's own error (bad input, data, checkpoint) reported by the launcher with the rank's exit status."""

    def __init__(self, message: str, exit_code: int):
        super().__init__(message)
        self.exit_code = exit_code


class Interrupted(ScaledrillError):
    """The run was stopped by SIGINT or SIGTERM after saving what it could."""

    exit_code = 130

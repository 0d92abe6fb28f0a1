"""Errors a user can act on: each names the key or file and the rule it broke.

The command line prints them as one paragraph without a traceback and exits with
the error's own status, so scripts can tell bad input from a failed run.
"""


def is_number(value) -> bool:
    """A real number for a config rule: int or float, but not a bool (which Python counts as an int)."""
    return isinstance(value, (int, float)) and not isinstance(value, bool)


def is_whole(value) -> bool:
    """A whole number for a config rule: an int, but not a bool."""
    return isinstance(value, int) and not isinstance(value, bool)


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


class Interrupted(ScaledrillError):
    """The run was stopped by SIGINT or SIGTERM after saving what it could.

    The status is 128 + the signal's number, as a shell reports a process the
    signal ended: 130 for SIGINT (Ctrl-C), 143 for SIGTERM."""

    exit_code = 130

    def __init__(self, message: str, signum: int = 2):
        super().__init__(message)
        self.exit_code = 128 + signum


INTERRUPT_STATUSES = (130, 143)  # 128 + SIGINT, 128 + SIGTERM


def error_for_status(status: int, message: str) -> ScaledrillError:
    """The error a process reported by its exit status, raised again in the launcher,
    so every backend ends a run with the same status as the local one."""
    if status in INTERRUPT_STATUSES:
        return Interrupted(message, status - 128)
    if status == ConfigError.exit_code:
        key, _, rule = message.partition(": ")  # as ConfigError wrote it
        return ConfigError(key, rule)
    for kind in (DataError, CheckpointError):
        if kind.exit_code == status:
            return kind(message)
    return WorkerFailed(message)

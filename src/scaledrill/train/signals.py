"""Stopping on SIGINT/SIGTERM at a consistent point.

The handler only raises a flag; the engine shares it through the step's scalar
all-reduce, so every process stops after the same step and checkpoints it.
"""

import signal
import threading


class StopFlag:
    """Set by SIGINT/SIGTERM; processes agree on it through the step's scalar all-reduce."""

    def __init__(self):
        self.raised = False
        self.signum = 0  # which signal: the run's exit status is 128 + it
        self._previous = {}

    def __enter__(self):
        if threading.current_thread() is threading.main_thread():
            for sig in (signal.SIGINT, signal.SIGTERM):
                self._previous[sig] = signal.signal(sig, self._handle)
        return self

    def _handle(self, signum, frame):
        self.raised = True
        self.signum = self.signum or signum

    def __exit__(self, *exc):
        for sig, handler in self._previous.items():
            signal.signal(sig, handler)
        return False

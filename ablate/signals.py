"""Ctrl-C and SIGTERM during a run: finish the step, save, stop."""

from __future__ import annotations

import contextlib
import signal


class StopSignals:
    """SIGINT (Ctrl-C) and SIGTERM handling for one run.

    Outside the training loop either signal raises KeyboardInterrupt. Inside it
    (``with stops.deferred():``) a signal is only noted: the loop finishes the step it is in,
    writes a checkpoint and stops, so a checkpoint never holds a half-applied optimizer step
    and a second signal during that save changes nothing.
    """

    SIGNALS = ("SIGINT", "SIGTERM")

    def __init__(self):
        self.received: str | None = None
        self._deferring = False
        self._previous = {}

    def _handle(self, signum, frame):
        if self._deferring:
            self.received = self.received or signal.Signals(signum).name
            return
        raise KeyboardInterrupt

    def __enter__(self):
        for name in self.SIGNALS:
            sig = getattr(signal, name)
            if signal.getsignal(sig) == signal.SIG_IGN:
                continue  # ignored by whoever started us (nohup, a background job): keep it so
            try:
                self._previous[sig] = signal.signal(sig, self._handle)
            except ValueError:  # not the main thread (some launchers): signals stay as they were
                self.__exit__()
                break
        return self

    def __exit__(self, *exc):
        for sig, previous in self._previous.items():
            signal.signal(sig, previous)
        self._previous.clear()
        return False

    @contextlib.contextmanager
    def deferred(self):
        self._deferring = True
        try:
            yield
        finally:
            self._deferring = False

"""Loaded (through PYTHONPATH) only by `watcher run` processes that a clock test starts under
libfaketime with FAKETIME_DONT_FAKE_MONOTONIC=1.

libfaketime 0.9.10 (Debian 12) mishandles clock_nanosleep(CLOCK_MONOTONIC, TIMER_ABSTIME),
which Python 3.11's time.sleep uses, and fails it with EINVAL when the monotonic clock is not
faked (wolfcw/libfaketime#426). Event waits, select and queue timeouts work. So time.sleep alone
is routed through an Event wait here; watcher's own code runs unchanged.
"""

import threading
import time

_never = threading.Event()


def _sleep(seconds: float) -> None:
    if seconds < 0:
        raise ValueError("sleep length must be non-negative")
    _never.wait(seconds)


time.sleep = _sleep

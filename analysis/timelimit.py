"""A time limit for long work: `with time_limit(300, "the analysis"): ...`.

In the main thread of a POSIX process (a CLI run, a forked background job, a Celery prefork
worker) the limit is hard: an interval timer raises `TimeLimitError` wherever the work is.
Elsewhere (a web server's thread) it is cooperative: `check_time()`, which the pipelines
call between steps, raises once the deadline has passed.
"""

from __future__ import annotations

import contextlib
import math
import signal
import threading
import time

from .errors import ParameterError, TimeLimitError

__all__ = ["time_limit", "check_time"]

_local = threading.local()


def _message(seconds: float, what: str) -> str:
    return f"Stopped {what} after its time limit of {seconds:g} s; try a smaller image or fewer frames."


@contextlib.contextmanager
def time_limit(seconds: float | None, what: str = "the work"):
    """Raise `TimeLimitError` if the block runs longer than `seconds` (None: no limit).

    >>> with time_limit(5, "a quick sum"):
    ...     sum(range(10))
    45
    >>> import time
    >>> try:
    ...     with time_limit(0.05, "a nap"):
    ...         time.sleep(1)
    ... except TimeLimitError as err:
    ...     print(err)
    Stopped a nap after its time limit of 0.05 s; try a smaller image or fewer frames.

    Parameters
    ----------
    seconds : float or None
        The limit, seconds of wall time.
    what : str
        What the message calls the work.

    Yields
    ------
    None
        The block runs inside the limit.
    """
    if seconds is None:
        yield
        return
    seconds = float(seconds)
    if not (math.isfinite(seconds) and seconds > 0):
        raise ParameterError(f"A time limit must be a positive number of seconds, got {seconds!r}.")
    outer = getattr(_local, "deadline", None)
    deadline = time.monotonic() + seconds
    # the innermost limit that ends first rules (an outer one that ends sooner stays in force)
    _local.deadline = outer if outer is not None and outer[0] <= deadline else (deadline, _message(seconds, what))
    hard = (threading.current_thread() is threading.main_thread() and hasattr(signal, "setitimer")
            and signal.getitimer(signal.ITIMER_REAL)[0] == 0.0)
    if hard:
        def on_alarm(signum, frame):
            raise TimeLimitError(_message(seconds, what))

        previous = signal.signal(signal.SIGALRM, on_alarm)
        signal.setitimer(signal.ITIMER_REAL, seconds)
    try:
        yield
    finally:
        if hard:
            signal.setitimer(signal.ITIMER_REAL, 0.0)
            signal.signal(signal.SIGALRM, previous)
        _local.deadline = outer


def check_time() -> None:
    """Raise `TimeLimitError` when the innermost `time_limit` of this thread has passed.

    >>> check_time()  # no limit set: nothing happens
    """
    d = getattr(_local, "deadline", None)
    if d is not None and time.monotonic() > d[0]:
        raise TimeLimitError(d[1])

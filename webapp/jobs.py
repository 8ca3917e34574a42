"""Background-callback managers for long work (an analysis of a big image, later a series).

diskcache in one fixed folder of the data dir by default (shared by every
gunicorn worker); Celery with Redis when ``RECINET_CELERY_BROKER`` is set.
"""

from __future__ import annotations

import secrets
import threading

import diskcache
from dash import DiskcacheManager, Input, Output

from .settings import Settings

__all__ = ["make_manager", "progress_reporter", "job_controls"]


class _OneResultPerJob:
    """Every job gets its own result, and a result written between two looks is not lost.

    Dash keys a job's result by the callback and its arguments, and deletes it once read. Two
    visitors analysing the same image with the same parameters at once shared one key: the
    first poll to read took the result, and the other page was told "no update" and never
    showed one (seen under gunicorn -w 2 with eight clients on six demo images). Each job's
    key therefore carries a random suffix.

    On each poll Dash reads the result, then asks whether the job still runs; "no result" and
    "not running" mean no update, and the browser stops waiting. A job that writes its result
    and ends between those two looks would lose it the same way, so a job whose result waits
    (the key read last in this thread) counts as running; the next poll reads it.
    """

    _last = threading.local()

    def build_cache_key(self, fn, args, cache_args_to_ignore, triggered):
        return f"{super().build_cache_key(fn, args, cache_args_to_ignore, triggered)}-{secrets.token_hex(8)}"

    def get_result(self, key, job):
        self._last.key = key
        return super().get_result(key, job)

    def job_running(self, job):
        key = self._last.__dict__.pop("key", None)
        if super().job_running(job):
            return True
        return key is not None and bool(self.result_ready(key))


_PRELOAD = ["webapp.app"]  # imported once in the job launcher, so each job starts at once


def _run_job(settings, job_fn, job_args):
    """In a job process: the server's settings as they were when the job was asked for, then the job."""
    from . import runtime  # a job process starts from the launcher, not from the server's state

    runtime.reset(settings)
    job_fn(*job_args)


def _start_job(job_fn, job_args) -> int:
    """Start a background job in its own process and return its pid.

    The job is forked from a launcher process (multiprocess 'forkserver': one process, started on the
    first job, with the app imported and no threads), never from the server. A threaded server forked
    while another of its threads was inside SQLite hands the child SQLite's process-wide mutexes and
    lock bookkeeping as they were, held by a thread the child does not have: with eight clients at
    once a job hung for good in ``sqlite3.connect`` (seen three runs in seven, each client's call
    then waiting out its 180 s), and others got 'database is locked' after the 30 s busy wait.
    Holding forks back while our own threads are inside SQLite made it rarer but cannot cover every
    SQLite call (Dash's own cache reads, statements the garbage collector finishes).
    """
    import multiprocess  # Dash's own dependency for diskcache jobs (dill pickles the job's closure)

    from . import runtime

    ctx = multiprocess.get_context("forkserver")
    ctx.set_forkserver_preload(_PRELOAD)
    proc = ctx.Process(target=_run_job, args=(runtime.get_settings(), job_fn, job_args), daemon=False)
    proc.start()
    return proc.pid


def make_manager(settings: Settings):
    """Return ``(manager, celery_app_or_None)`` for ``Dash(background_callback_manager=...)``.

    Parameters
    ----------
    settings : Settings
        The app's settings (:func:`webapp.settings.load_settings`).

    Returns
    -------
    manager : DiskcacheManager or CeleryManager
        Runs the background callbacks.
    celery_app : celery.Celery or None
        The Celery app when a broker is set.
    """
    if settings.celery_broker:
        from celery import Celery  # optional (pip install "celery[redis]"): only with a broker set
        from dash import CeleryManager  # needs celery installed, so only here

        class _Celery(_OneResultPerJob, CeleryManager):
            pass

        celery_app = Celery("recinet", broker=settings.celery_broker, backend=settings.celery_broker)
        return _Celery(celery_app), celery_app
    class _Diskcache(_OneResultPerJob, DiskcacheManager):
        def call_job_fn(self, key, job_fn, args, context):
            return _start_job(job_fn, (key, self._make_progress_key(key), args, context))

        # a job is the launcher's child, not the server's: once ended it is reaped at once, and
        # may vanish between Dash's "does it exist" and its next look
        def terminate_job(self, job):
            import psutil  # Dash's own dependency for diskcache jobs

            try:
                super().terminate_job(job)
            except psutil.NoSuchProcess:
                pass

        def job_running(self, job):
            import psutil

            try:
                return super().job_running(job)
            except psutil.NoSuchProcess:
                return False

    settings.cache_dir.mkdir(parents=True, exist_ok=True)
    return _Diskcache(diskcache.Cache(str(settings.cache_dir))), None


def progress_reporter(set_progress, *, start: float = 0.0, span: float = 100.0):
    """Adapt the pipeline's progress calls to a Dash progress bar (value, max as text).

    Accepts ``report(fraction)``, ``report(fraction, message)`` or ``report(done, total)``.

    >>> seen = []
    >>> r = progress_reporter(lambda v: seen.append(v), start=10, span=80)
    >>> r(0.5); r(3, 4); seen
    [('50', '100'), ('70', '100')]

    Parameters
    ----------
    set_progress : callable
        Dash's ``set_progress`` of a background callback.
    start : float, keyword-only
        Bar value at fraction 0.
    span : float, keyword-only
        Bar length of the whole work.

    Returns
    -------
    callable
        ``report(...)`` as above.
    """
    def report(*args, **_kw):
        try:
            nums = [float(a) for a in args if isinstance(a, (int, float)) and not isinstance(a, bool)]
        except (TypeError, ValueError):
            return
        if not nums:
            return
        if len(nums) >= 2 and nums[1] > 0:
            frac = nums[0] / nums[1]
        else:
            frac = nums[0] if nums[0] <= 1.0 else nums[0] / 100.0
        frac = min(max(frac, 0.0), 1.0)
        set_progress((str(int(round(start + span * frac))), "100"))
    return report


def job_controls(run_id: str, cancel_id: str, progress_id: str) -> dict:
    """Keyword arguments of a background callback started by `run_id`: a progress bar
    (`progress_id`, shown only while it runs), the start button disabled and the stop
    button (`cancel_id`) enabled meanwhile, and a click on stop cancelling it.

    Parameters
    ----------
    run_id : str
        Id of the start button.
    cancel_id : str
        Id of the stop button.
    progress_id : str
        Id of the progress bar.

    Returns
    -------
    dict
        ``running``, ``progress``, ``cancel`` and ``background=True`` for ``dash.callback``.
    """
    return {
        "background": True,
        "progress": [Output(progress_id, "value"), Output(progress_id, "max")],
        "running": [
            (Output(run_id, "disabled"), True, False),
            (Output(cancel_id, "disabled"), False, True),
            (Output(progress_id, "style"), {"visibility": "visible"}, {"visibility": "hidden"}),
        ],
        "cancel": [Input(cancel_id, "n_clicks")],
    }

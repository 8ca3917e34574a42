"""Background-job managers (webapp/jobs.py): every job gets its own result, and a result
written between Dash's two looks is not lost.

Dash answers a poll of a background job by reading its result and then asking whether the
job still runs (dash/_callback.py, `_update_background_callback` and
`_handle_rest_background_callback`): no result and not running means "no update", after
which the browser stops polling. The tests replay that order with a job that writes its
result and ends between the two looks.
"""

from __future__ import annotations

import subprocess
import sys

import pytest

from webapp.jobs import make_manager
from webapp.settings import load_settings


def _ended_pid() -> int:
    """The id of a process that has ended (and been reaped)."""
    p = subprocess.Popen([sys.executable, "-c", "pass"])
    p.wait(timeout=30)
    return p.pid


@pytest.fixture
def manager(tmp_path):
    m, _ = make_manager(load_settings({"RECINET_DATA_DIR": str(tmp_path)}))
    return m


def test_a_result_written_between_the_two_looks_keeps_the_job_running(manager):
    key, job = "result-of-one-job", _ended_pid()
    assert manager.get_result(key, job) is manager.UNDEFINED  # Dash's first look: nothing yet
    manager.handle.set(key, {"answer": 42})                    # the job writes its result and ends
    assert manager.job_running(job)                            # Dash's second look: poll again
    assert manager.get_result(key, job) == {"answer": 42}      # the next poll reads it
    assert not manager.job_running(job)                        # and then the job is over


def test_a_job_that_ended_without_a_result_is_over(manager):
    job = _ended_pid()
    assert manager.get_result("never-written", job) is manager.UNDEFINED
    assert not manager.job_running(job)


def test_the_key_of_one_poll_is_not_used_by_the_next(manager):
    job = _ended_pid()
    manager.get_result("k1", job)
    manager.handle.set("k1", 1)
    assert manager.job_running(job)
    assert not manager.job_running(job)  # a second question without a new look is answered by the process alone


def test_two_jobs_with_the_same_arguments_get_their_own_results(manager):
    def fn(a, b):
        return a + b

    k1 = manager.build_cache_key(fn, [1, 2], [], None)
    k2 = manager.build_cache_key(fn, [1, 2], [], None)
    assert k1 != k2
    manager.handle.set(k1, "first")
    manager.handle.set(k2, "second")
    assert (manager.get_result(k1, None), manager.get_result(k2, None)) == ("first", "second")

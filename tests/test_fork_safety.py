"""No executor, thread or lock may be inherited across a fork.

Dash's diskcache background callbacks, gunicorn and Celery prefork workers run each job in
a forked copy of the server. A thread pool created in the parent before the fork has no
threads in the child, so a job that waits on it there never returns.
"""

from __future__ import annotations

import multiprocessing as mp
import os

import numpy as np
import pytest

from analysis.nets import parse_substrate
from analysis.optics import ScreenGeometry
from analysis.simulate import forward_pattern, render_image
from analysis.spots import measure_image

pytestmark = pytest.mark.skipif(not hasattr(os, "fork"), reason="needs os.fork")


def _image():
    # 600² is above the size where the matched filter runs as two row strips on a second thread
    geom = ScreenGeometry(300.0, 300.0, 280.0, distortion=0.2)
    pat = forward_pattern(parse_substrate("Cu(100)"), [[[2, 0], [0, 2]]], energy_eV=110.0, geometry=geom)
    return render_image(pat, shape=(600, 600), rng=np.random.default_rng(3)).image


def _measure_in_child(image, queue):
    queue.put(len(measure_image(image).spots))


def test_measure_image_after_fork_returns():
    image = _image()
    n_parent = len(measure_image(image).spots)  # the parent has now used its array threads
    ctx = mp.get_context("fork")
    queue = ctx.Queue()
    child = ctx.Process(target=_measure_in_child, args=(image, queue))
    child.start()
    child.join(timeout=60)
    hung = child.is_alive()
    if hung:
        child.kill()
        child.join()
    assert not hung, "measure_image hung in a forked child"
    assert child.exitcode == 0
    assert queue.get(timeout=5) == n_parent

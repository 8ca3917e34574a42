"""The group server run for real: gunicorn workers, background jobs on a Celery worker over
Redis, PostgreSQL shared by the workers. The web app is driven over HTTP as the browser
drives it (one page load: its callbacks posted to /_dash-update-component, background ones
polled until their result comes back).

The truth is what the renderer was given: the demo images' JSON (demo_images/*.json: Wood
notation, matrix, pattern centre) and the synthetic series of tests/test_webapp_series.py
(its screen geometry TRUTH). The services come from `.ci/run` (RECINET_TEST_REDIS_URL with
a Celery worker whose data folder is RECINET_TEST_CELERY_DATA_DIR; RECINET_TEST_PG_URL);
without them these tests skip and say why. Every wait is bounded.
"""

from __future__ import annotations

import base64
import hashlib
import importlib.util
import io
import json
import os
import re
import signal
import socket
import subprocess
import sys
import threading
import time
import urllib.error
import urllib.parse
import urllib.request
from pathlib import Path

import numpy as np
import pytest

ROOT = Path(__file__).resolve().parent.parent
DEMO = ROOT / "demo_images"
DEMOS = ["cu100_CX-3_c2x2.png", "pt111_PX-7_oxygen_p2x2.png", "ru0001_RX-2_sqrt3.png",
         "si100_SX-1_2x1_two_domains.png", "pt111_PX-9_sqrt7_two_domains.png", "cu100_CX-3_clean_reference.png"]
KEY = "group key of the test server"
CALL_TIMEOUT_S = float(os.environ.get("RECINET_TEST_CALL_TIMEOUT_S", 180))

pytestmark = pytest.mark.slow


# --------------------------------------------------------------------------- the services

def _need_gunicorn():
    if importlib.util.find_spec("gunicorn") is None:
        pytest.skip("gunicorn is not installed (pip install -e '.[test]' brings it)")


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


class Gunicorn:
    """`gunicorn -w 2 -b 127.0.0.1:PORT --timeout 120 webapp.app:server` (the README's command) in `env`."""

    def __init__(self, env: dict, log: Path, workers: int = 2):
        self.port = _free_port()
        self.base = f"http://127.0.0.1:{self.port}"
        self.log = log
        cmd = [sys.executable, "-m", "gunicorn", "-w", str(workers), "-b", f"127.0.0.1:{self.port}",
               "--timeout", "120", "webapp.app:server"]
        self.proc = subprocess.Popen(cmd, cwd=ROOT, env=env, stdout=log.open("wb"), stderr=subprocess.STDOUT,
                                     start_new_session=True)
        deadline = time.monotonic() + 90
        while time.monotonic() < deadline:
            if self.proc.poll() is not None:
                break
            try:
                with urllib.request.urlopen(self.base + "/login", timeout=5):
                    return
            except (urllib.error.URLError, OSError):
                time.sleep(0.3)
        self.stop()
        pytest.fail("gunicorn did not answer within 90 s:\n" + log.read_text(errors="replace")[-2000:])

    def stop(self):
        try:
            os.killpg(self.proc.pid, signal.SIGTERM)
            self.proc.wait(timeout=20)
        except ProcessLookupError:
            pass
        except subprocess.TimeoutExpired:
            os.killpg(self.proc.pid, signal.SIGKILL)
            self.proc.wait(timeout=10)


def _server_env(data_dir, **extra) -> dict:
    env = {**os.environ, "PYTHONPATH": str(ROOT), "RECINET_DATA_DIR": str(data_dir)}
    for k in ("RECINET_DATABASE_URL", "RECINET_ACCESS_KEY", "RECINET_CELERY_BROKER", "RECINET_BEHIND_PROXY",
              "RECINET_HTTPS"):
        env.pop(k, None)
    env.update({k: str(v) for k, v in extra.items()})
    return env


# --------------------------------------------------------------------------- a page load over HTTP

class Page:
    """One page load of the app: its callbacks called over HTTP as the browser calls them."""

    def __init__(self, base: str, headers: dict | None = None):
        self.base, self.headers = base, dict(headers or {})
        html = self._request("GET", "/")[1].decode()
        m = re.search(r'<script id="_dash-config" type="application/json"[^>]*>(.*?)</script>', html, re.S)
        self.end_id = json.loads(m.group(1))["end_id"]  # the page load's signed id; background handles are bound to it
        self.deps = json.loads(self._request("GET", "/_dash-dependencies")[1])
        self.jobs: list[str] = []

    def _request(self, method, path, body=None):
        req = urllib.request.Request(self.base + path, method=method,
                                     data=None if body is None else json.dumps(body).encode(),
                                     headers={"Content-Type": "application/json", **self.headers})
        with urllib.request.urlopen(req, timeout=120) as r:
            return r.status, r.read()

    @staticmethod
    def _outputs(spec: str) -> list[dict]:
        parts = spec[2:-2].split("...") if spec.startswith("..") else [spec]
        return [dict(zip(("id", "property"), p.split(".", 1))) for p in parts]

    def call(self, trigger: tuple, values: dict | None = None, *, output: tuple) -> dict | None:
        """Fire ``trigger = (id, prop, value)``; the other inputs and states come from `values`
        ``{(id, prop): value}`` (None when absent). The callback is the one fired by the trigger whose
        outputs include ``output = (id, prop)``. Returns ``{id: {prop: value}}``, or None for no update."""
        values = {**(values or {}), trigger[:2]: trigger[2]}
        dep = next(d for d in self.deps
                   if any((i["id"], i["property"]) == trigger[:2] for i in d["inputs"])
                   and any((o["id"], o["property"].split("@")[0]) == output for o in self._outputs(d["output"])))
        outs = self._outputs(dep["output"])
        body = {"output": dep["output"], "outputs": outs if dep["output"].startswith("..") else outs[0],
                "inputs": [{**i, "value": values.get((i["id"], i["property"]))} for i in dep["inputs"]],
                "state": [{**s, "value": values.get((s["id"], s["property"]))} for s in dep["state"]],
                "changedPropIds": [f"{trigger[0]}.{trigger[1]}"]}
        query = {"endId": self.end_id}
        t0 = time.monotonic()
        deadline = t0 + CALL_TIMEOUT_S
        seen = []
        while True:
            status, raw = self._request("POST", "/_dash-update-component?" + urllib.parse.urlencode(query), body)
            seen.append((round(time.monotonic() - t0, 2), status, raw[:120]))
            if status == 204:
                if "job" in query:  # the browser stops waiting here, and the page never shows a result
                    raise AssertionError(f"the background job of {output} ended with no result after "
                                         f"{len(seen)} polls; the last: {seen[-3:]}")
                return None
            data = json.loads(raw)
            if "response" in data:
                return data["response"]
            if "cacheKey" in data:  # a background job started: poll it with its handles
                query.update(cacheKey=data["cacheKey"], job=data["job"])
                self.jobs.append(data["job"].rsplit("~", 1)[0])
            if time.monotonic() > deadline:
                raise TimeoutError(f"{output} did not come back within {CALL_TIMEOUT_S:.0f} s")
            time.sleep(0.25)

    def get_json(self, path):
        return json.loads(self._request("GET", path)[1])


def _truth(demo: str) -> dict:
    return json.loads((DEMO / demo).with_suffix(".json").read_text())


def _matrix_text(m) -> str:
    return " / ".join(" ".join(f"{v:g}" for v in row) for row in m)


def analyse_demo(page: Page, demo: str, *, sample: str) -> dict:
    """Pick a demo, analyse it, try the renderer's matrix, save, read the save back; returns what came back."""
    from webapp import ids

    r = page.call((ids.DEMO, "value", demo), output=(ids.IMAGE, "data"))
    image, energy, substrate = r[ids.IMAGE]["data"], r[ids.ENERGY]["value"], r[ids.SUBSTRATE]["value"]
    state = {(ids.IMAGE, "data"): image, (ids.ENERGY, "value"): energy, (ids.SUBSTRATE, "value"): substrate,
             (ids.EDITS, "data"): r[ids.EDITS]["data"]}
    r = page.call((ids.RUN, "n_clicks", 1), state, output=(ids.RESULT, "data"))
    assert ids.RESULT in r, f"the analysis of {demo} failed: {json.dumps(r.get(ids.MESSAGE))[:400]}"
    record = r[ids.RESULT]["data"]
    matrix = _truth(demo)["scenario"]["matrix"] or [[1, 0], [0, 1]]
    model = page.call((ids.MODEL_TRY, "n_clicks", 1), {**state, (ids.RESULT, "data"): record,
                                                       (ids.MODEL_TEXT, "value"): _matrix_text(matrix)},
                      output=(ids.MODEL, "data"))[ids.MODEL]["data"]
    saved = page.call((ids.SAVE, "n_clicks", 1), {**state, (ids.RESULT, "data"): record,
                                                  (ids.SAMPLE, "value"): sample, (ids.NOTES, "value"): f"notes of {sample}"},
                      output=(ids.SAVE_NOTE, "children"))
    token = re.search(r"/analysis/([A-Za-z0-9_-]+)", json.dumps(saved[ids.SHARE_LINK])).group(1)
    return {"image": image, "record": record, "model": model, "token": token,
            "read": page.get_json(f"/api/analyses/{token}")}


def check_analysis(demo: str, got: dict, *, sample: str):
    """What came back is this demo's own answer, as the renderer's truth says."""
    truth = _truth(demo)
    sha = hashlib.sha256((DEMO / demo).read_bytes()).hexdigest()
    record, result = got["record"], got["record"]["result"]
    assert got["image"]["sha"] == sha and record["sha"] == sha
    ov = result["overlayer"]
    # demo JSON: the Wood notation the renderer drew (none for the clean reference)
    if truth["scenario"]["wood_notation"] is None:
        assert ov["kind"] == "none"
    else:
        assert ov["wood"] == truth["scenario"]["wood_notation"]
    # demo JSON: the pattern centre; within 0.5 px (the fitted centres of these frames lie within 0.05 px)
    assert np.hypot(*np.subtract(result["center_px"], truth["center_px"])) < 0.5
    # the renderer's matrix explains every fractional spot of this image, and nothing is left over
    n_frac = sum(s["kind"] != "integer" for s in result["spots"])
    assert (got["model"]["explained"], got["model"]["unexplained"]) == (n_frac, 0)
    # the save reads back as this client's: its name, its image, its result
    read = got["read"]
    assert read["token"] == got["token"] and read["sample_name"] == sample and read["notes"] == f"notes of {sample}"
    assert hashlib.sha256(base64.b64decode(read["image"]["data_base64"])).hexdigest() == sha
    assert read["result"]["overlayer"]["wood"] == ov["wood"] and read["result"]["center_px"] == result["center_px"]


# --------------------------------------------------------------------------- (a) Celery on Redis

@pytest.fixture
def celery_server(tmp_path):
    url, data = os.environ.get("RECINET_TEST_REDIS_URL"), os.environ.get("RECINET_TEST_CELERY_DATA_DIR")
    if not (url and data):
        pytest.skip("needs Redis with a Celery worker of the app: .ci/run starts both and sets "
                    "RECINET_TEST_REDIS_URL and RECINET_TEST_CELERY_DATA_DIR")
    _need_gunicorn()
    from celery import Celery

    if not Celery(broker=url, backend=url).control.ping(timeout=5):
        pytest.fail(f"no Celery worker answers on {url}")
    srv = Gunicorn(_server_env(data, RECINET_CELERY_BROKER=url, RECINET_ACCESS_KEY=KEY), tmp_path / "gunicorn.log")
    yield srv, url
    srv.stop()


def _ran_on_the_worker(redis_url: str, job: str) -> bool:
    """The job handle is a Celery task id, and Celery's result backend in Redis says it succeeded."""
    import redis

    if not re.fullmatch(r"[0-9a-f]{8}-[0-9a-f]{4}-[0-9a-f]{4}-[0-9a-f]{4}-[0-9a-f]{12}", job):
        return False  # a process id: the job ran beside the web server
    meta = redis.Redis.from_url(redis_url).get(f"celery-task-meta-{job}")
    return meta is not None and json.loads(meta)["status"] == "SUCCESS"


def test_an_analysis_and_a_series_run_on_the_celery_worker(celery_server):
    import tifffile

    from test_webapp_series import TRUTH, render_frames
    from webapp import ids

    srv, url = celery_server
    page = Page(srv.base, {"X-Recinet-Key": KEY})

    demo = "cu100_CX-3_c2x2.png"
    got = analyse_demo(page, demo, sample="through celery")
    check_analysis(demo, got, sample="through celery")
    assert len(page.jobs) == 1 and _ran_on_the_worker(url, page.jobs[0])

    energies = np.arange(150.0, 162.0, 2.0)  # six frames
    buf = io.BytesIO()
    tifffile.imwrite(buf, np.stack(render_frames(energies)), photometric="minisblack")
    payload = {"contents": "data:image/tiff;base64," + base64.b64encode(buf.getvalue()).decode(),
               "filename": "cu100_series.tif"}
    meta = page.call((ids.SERIES_PAYLOAD, "data", payload), output=(ids.SERIES_META, "data"))[ids.SERIES_META]["data"]
    r = page.call((ids.SERIES_RUN, "n_clicks", 1), {
        (ids.SERIES_META, "data"): meta, (ids.SERIES_ENERGY_MODE, "value"): "step",
        (ids.SERIES_START, "value"): float(energies[0]), (ids.SERIES_STEP, "value"): 2.0,
        (ids.SERIES_SUBSTRATE, "value"): "Cu(100)"}, output=(ids.SERIES_RESULT, "data"))
    summary = r[ids.SERIES_RESULT]["data"]
    assert summary is not None, json.dumps(r[ids.SERIES_MESSAGE])[:300]
    assert len(page.jobs) == 2 and _ran_on_the_worker(url, page.jobs[1])
    assert summary["n_frames"] == energies.size and summary["energy_eV"] == energies.tolist()
    assert summary["index"]["wood"] == "c(2×2)"  # the renderer drew c(2×2) on Cu(100)
    g = summary["calibration"]["geometry"]
    # tests/test_webapp_series.TRUTH: the screen geometry given to the renderer
    assert np.hypot(g["center_x_px"] - TRUTH.center_x_px, g["center_y_px"] - TRUTH.center_y_px) < 0.5
    assert abs(g["distortion"] - TRUTH.distortion) < 0.02
    assert sum(1 for b in summary["beams"] if b["n_valid"]) >= 10


# --------------------------------------------------------------------------- (b) gunicorn on PostgreSQL

N_CLIENTS = 8


@pytest.fixture
def pg_server(tmp_path):
    base = os.environ.get("RECINET_TEST_PG_URL")
    if not base:
        pytest.skip("RECINET_TEST_PG_URL is not set (.ci/run starts a throwaway PostgreSQL and sets it)")
    pytest.importorskip("psycopg", reason="psycopg is not installed: pip install 'psycopg[binary]'")
    _need_gunicorn()
    from conftest import _pg_database

    gen = _pg_database(base)
    url = next(gen)
    srv = Gunicorn(_server_env(tmp_path / "data", RECINET_DATABASE_URL=url), tmp_path / "gunicorn.log")
    try:
        yield srv, url
    finally:
        srv.stop()
        gen.close()


def test_eight_clients_on_two_workers_and_postgresql_lose_nothing_and_mix_nothing(pg_server):
    from webapp.store import Store

    srv, url = pg_server
    got: dict[int, dict] = {}
    errors: list[str] = []
    start = threading.Barrier(N_CLIENTS)

    def client(c: int):
        try:
            page = Page(srv.base)
            start.wait(timeout=60)
            got[c] = analyse_demo(page, DEMOS[c % len(DEMOS)], sample=f"client {c}")
        except BaseException as err:  # noqa: BLE001 - reported below
            import traceback

            errors.append(f"client {c}: " + "".join(traceback.format_exception(err))[-1500:])

    t0 = time.monotonic()
    threads = [threading.Thread(target=client, args=(c,), daemon=True) for c in range(N_CLIENTS)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(timeout=max(1.0, 600 - (time.monotonic() - t0)))
    assert not any(t.is_alive() for t in threads), "clients still waiting after 600 s"
    assert not errors, "\n".join(errors[:3])
    assert sorted(got) == list(range(N_CLIENTS))
    for c, g in got.items():
        check_analysis(DEMOS[c % len(DEMOS)], g, sample=f"client {c}")
    assert len({g["token"] for g in got.values()}) == N_CLIENTS  # a link each

    store = Store(url)  # the database behind both workers holds exactly these analyses, each image once
    assert store.count_analyses() == N_CLIENTS
    listed = store.recent(100)
    assert {a.token for a in listed} == {g["token"] for g in got.values()}
    assert len({a.image_sha256 for a in listed}) == min(N_CLIENTS, len(DEMOS))
    store.close()

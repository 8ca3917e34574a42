"""Several clients at once over HTTP on loopback, to two server processes sharing one database
(a SQLite file; and PostgreSQL when RECINET_TEST_PG_URL is set): saving, and analysing as
background jobs, trying a model and saving."""

from __future__ import annotations

import io
import json
import os
import socket
import subprocess
import sys
import threading
import time
import urllib.request
from pathlib import Path

import numpy as np
import pytest
from PIL import Image

ROOT = Path(__file__).resolve().parent.parent
N_CLIENTS, N_SAVES = 6, 5  # 30 saves in all: bounded in count; every wait below is bounded in time

_SERVE = """
import sys
from werkzeug.serving import make_server
import webapp.app as web
srv = make_server("127.0.0.1", int(sys.argv[1]), web.server, threaded=True)
print("ready", flush=True)
srv.serve_forever()
"""


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _png(seed: int) -> bytes:
    buf = io.BytesIO()
    Image.fromarray((np.random.default_rng(seed).random((48, 64)) * 60000).astype(np.uint16)).save(buf, format="PNG")
    return buf.getvalue()


@pytest.fixture
def two_servers(tmp_path, store_url):
    env = {**os.environ, "RECINET_DATA_DIR": str(tmp_path), "PYTHONPATH": str(ROOT), "RECINET_DATABASE_URL": store_url}
    env.pop("RECINET_ACCESS_KEY", None)
    procs, ports = [], []
    try:
        for _ in range(2):
            port = _free_port()
            log = open(tmp_path / f"server-{len(procs)}.log", "w")  # read when a test fails
            p = subprocess.Popen([sys.executable, "-c", _SERVE, str(port)], cwd=ROOT, env=env,
                                 stdout=subprocess.PIPE, stderr=log, text=True)
            log.close()
            procs.append(p)
            ports.append(port)
        for p in procs:
            line = p.stdout.readline()  # the child prints "ready" once it listens
            assert line.strip() == "ready", "a test server did not start"
        yield ports, store_url
    finally:
        for p in procs:
            p.terminate()
        for p in procs:
            try:
                p.wait(timeout=10)
            except subprocess.TimeoutExpired:
                p.kill()


def _post(port, doc) -> str:
    req = urllib.request.Request(f"http://127.0.0.1:{port}/api/analyses", data=json.dumps(doc).encode(),
                                 headers={"Content-Type": "application/json"}, method="POST")
    with urllib.request.urlopen(req, timeout=60) as r:
        assert r.status == 201
        return json.loads(r.read())["token"]


def _get(port, token) -> dict:
    with urllib.request.urlopen(f"http://127.0.0.1:{port}/api/analyses/{token}", timeout=60) as r:
        return json.loads(r.read())


def test_clients_saving_at_once_lose_nothing_and_mix_nothing(two_servers):
    from webapp import service
    from webapp.store import Store

    ports, url = two_servers
    shared_image = _png(0)  # every client also saves the same image: it must be stored once
    written: list[tuple[str, int, int, bytes]] = []
    errors: list[BaseException] = []
    lock = threading.Lock()
    start = threading.Barrier(N_CLIENTS)

    def client(c: int):
        try:
            start.wait(timeout=30)
            for i in range(N_SAVES):
                img = shared_image if i == 0 else _png(1000 * c + i)
                doc = service.export_bundle(
                    image_bytes=img, filename=f"c{c}-{i}.png", parameters={"energy_eV": 50.0 + c, "i": i},
                    edits={"added": [[float(c), float(i)]], "removed": [], "center": None},
                    result={"client": c, "i": i, "overlayer": {"wood": f"p({c + 1}×{i + 1})"}},
                    sample_name=f"client {c} save {i}", notes=f"note {c}/{i}")
                token = _post(ports[(c + i) % 2], doc)
                with lock:
                    written.append((token, c, i, img))
        except BaseException as err:  # noqa: BLE001 - reported below
            errors.append(err)

    threads = [threading.Thread(target=client, args=(c,)) for c in range(N_CLIENTS)]
    t0 = time.monotonic()
    for t in threads:
        t.start()
    for t in threads:
        t.join(timeout=180)
    assert not any(t.is_alive() for t in threads), "clients did not finish within 180 s"
    assert not errors, errors[:3]
    assert len(written) == N_CLIENTS * N_SAVES
    assert len({w[0] for w in written}) == len(written)  # every save got its own link

    for token, c, i, img in written:  # read back through the other server than the one that saved
        got = _get(ports[(c + i + 1) % 2], token)
        assert got["sample_name"] == f"client {c} save {i}" and got["notes"] == f"note {c}/{i}"
        assert got["result"]["client"] == c and got["result"]["i"] == i
        assert got["parameters"] == {"energy_eV": 50.0 + c, "i": i}
        assert got["edits"]["added"] == [[float(c), float(i)]]
        assert service.read_bundle(json.dumps(got), max_bytes=10**7)["image"]["data"] == img

    store = Store(url)
    assert store.count_analyses() == N_CLIENTS * N_SAVES
    listed = store.recent(500)
    assert len({a.image_sha256 for a in listed}) == 1 + N_CLIENTS * (N_SAVES - 1)
    assert time.monotonic() - t0 < 180


N_ANALYSTS = 8
ANALYST_LIMIT_S = 420  # 8 analyses of 1024² demo images at once on a shared 2-core machine


@pytest.mark.slow
def test_eight_clients_analyse_try_a_model_and_save_at_once(two_servers, tmp_path):
    """Eight page loads, four on each server process: each picks a demo image, analyses it as a
    background job, tries the renderer's matrix and saves, all at once. Each gets its own answer
    (checked against the demo's truth, demo_images/*.json), none is lost, none waits forever."""
    from test_group_server import DEMOS, Page, analyse_demo, check_analysis

    from webapp.store import Store

    ports, url = two_servers
    got: dict[int, dict] = {}
    errors: list[str] = []
    start = threading.Barrier(N_ANALYSTS)

    def client(c: int):
        try:
            page = Page(f"http://127.0.0.1:{ports[c % 2]}")
            start.wait(timeout=60)
            got[c] = analyse_demo(page, DEMOS[c % len(DEMOS)], sample=f"analyst {c}")
        except BaseException as err:  # noqa: BLE001 - reported below
            import traceback

            errors.append(f"client {c}: " + "".join(traceback.format_exception(err))[-1500:])

    t0 = time.monotonic()
    threads = [threading.Thread(target=client, args=(c,), daemon=True) for c in range(N_ANALYSTS)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(timeout=max(1.0, ANALYST_LIMIT_S - (time.monotonic() - t0)))
    assert not any(t.is_alive() for t in threads), f"clients still waiting after {ANALYST_LIMIT_S} s"
    logs = "".join(line for f in sorted(tmp_path.glob("server-*.log"))
                   for line in f.read_text(errors="replace").splitlines(True) if "Traceback" in line or "Error" in line)
    assert not errors, f"{len(errors)} of {N_ANALYSTS} failed; finished: {sorted(got)}\n" + "\n".join(errors[:2]) + logs[-3000:]
    assert sorted(got) == list(range(N_ANALYSTS))
    for c, g in got.items():
        check_analysis(DEMOS[c % len(DEMOS)], g, sample=f"analyst {c}")
        assert g["model"]["explained"] >= 0 and g["read"]["parameters"]["energy_eV"] == g["record"]["parameters"]["energy_eV"]
    assert len({g["token"] for g in got.values()}) == N_ANALYSTS  # a link each

    store = Store(url)  # the one database behind both servers holds exactly these, each image once
    listed = store.recent(100)
    assert {a.token for a in listed} == {g["token"] for g in got.values()}
    assert len({a.image_sha256 for a in listed}) == min(N_ANALYSTS, len(DEMOS))
    store.close()
    print(f"8 clients analysed, tried a model and saved in {time.monotonic() - t0:.1f} s")

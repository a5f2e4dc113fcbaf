"""What keeps the polled API answering quickly: a full queue says when to retry, and the serving
process starts with its long-lived objects out of the garbage collector's reach."""
from __future__ import annotations

import json
import subprocess
import sys

from burstlens.service.testing import TINY, corpus_files


def test_queue_full_429_says_when_to_retry_in_whole_seconds(make_client):
    """The 429 for a full queue carries Retry-After as delay-seconds, a non-negative integer
    (RFC 6585 §4: a 429 MAY include Retry-After; RFC 9110 §10.2.3: its delay-seconds form),
    at least 1 and no shorter than an idle worker's wait between claims (``poll_s``, 0.2 s in
    the tests, so 1), and the problem document still names the limit."""
    client = make_client(max_queued_jobs=1)
    corpus = client.post("/v1/corpora", files=corpus_files(1)).json()
    first = client.post("/v1/jobs", json={"corpus_id": corpus["id"], "settings": TINY})
    assert first.status_code == 201 and "retry-after" not in first.headers
    full = client.post("/v1/jobs", json={"corpus_id": corpus["id"],
                                         "settings": {**TINY, "seed": 1}})
    assert full.status_code == 429
    assert full.headers["retry-after"].isdigit() and int(full.headers["retry-after"]) == 1
    assert full.headers["content-type"].startswith("application/problem+json")
    assert full.json()["status"] == 429 and "limit 1" in full.json()["detail"]


def test_settle_imports_the_routes_modules_and_freezes_the_startup_heap(tmp_path):
    """After ``settle`` (what ``serve`` runs once the app is made) the modules the routes
    import on first use are loaded, and the objects alive then are in the collector's permanent
    generation (Python docs, ``gc.freeze``: "move all objects tracked by the garbage collector
    into a permanent generation, i.e. ignore them in all the future collections"), so a full
    collection afterwards tracks a small fraction of them. Run in a child interpreter: freezing
    this one would change every later test's collections."""
    code = (
        "import gc, json, sys\n"
        "from burstlens.service.app import create_app\n"
        "from burstlens.service.config import ServiceSettings\n"
        "from burstlens.service.serving import ROUTE_MODULES, settle\n"
        f"create_app(ServiceSettings(data_dir={str(tmp_path / 'data')!r}))\n"
        "before = len(gc.get_objects())\n"
        "settle()\n"
        "print(json.dumps({'before': before, 'frozen': gc.get_freeze_count(),\n"
        "                  'tracked': len(gc.get_objects()),\n"
        "                  'loaded': all(m in sys.modules for m in ROUTE_MODULES)}))\n")
    out = json.loads(subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                                    check=True, timeout=120).stdout)
    assert out["loaded"]
    assert out["frozen"] > 0.9 * out["before"]  # the garbage among them is collected first
    assert out["tracked"] < 0.01 * out["frozen"]

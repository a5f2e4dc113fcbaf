"""The backup and restore procedure of deploy/README.md, run as written, on a live data dir.

The shell blocks come from the guide itself (between its ``<!-- backup -->`` and
``<!-- restore -->`` markers), with only the two folder variables and the virtualenv path
pointed at this test's folders, so the guide cannot drift from what is tested. The blocks run
`burstlens backup` and `burstlens restore`; their own properties (kills, refusals) are tested in
test_backup_command.py.
"""
from __future__ import annotations

import re
import shutil
import subprocess
import sys
from pathlib import Path

import pytest
from fastapi.testclient import TestClient
from burstlens.service.testing import TINY, corpus_files, settings_for

from burstlens.service.app import create_app
from burstlens.service.store import Store
from burstlens.service.worker import Worker

ROOT = Path(__file__).resolve().parents[2]
GUIDE = ROOT / "deploy" / "README.md"
INSTALLED_BIN = "/opt/burstlens/venv/bin/"

pytestmark = pytest.mark.timeout(240)


def guide_block(marker: str) -> str:
    """The first fenced shell block after ``<!-- marker -->`` in the guide."""
    text = GUIDE.read_text(encoding="utf-8")
    match = re.search(rf"<!-- {marker} -->\s*```(?:sh|bash)?\n(.*?)```", text, re.S)
    assert match, f"deploy/README.md has no shell block after <!-- {marker} -->"
    return match.group(1)


def run_block(marker: str, data: Path, backup: Path) -> None:
    script = guide_block(marker)
    assert re.search(r"^DATA=", script, re.M) and re.search(r"^BACKUP=", script, re.M), \
        f"the {marker} block must set DATA= and BACKUP= first"
    script = re.sub(r"^DATA=.*$", f"DATA='{data}'", script, count=1, flags=re.M)
    script = re.sub(r"^BACKUP=.*$", f"BACKUP='{backup}'", script, count=1, flags=re.M)
    script = script.replace(INSTALLED_BIN, str(Path(sys.executable).parent) + "/")
    done = subprocess.run(["bash", "-euo", "pipefail", "-c", script], capture_output=True,
                          text=True, timeout=120)
    assert done.returncode == 0, f"{marker} block failed:\n{script}\n{done.stdout}\n{done.stderr}"


def snapshot(store: Store) -> dict:
    """Every token, corpus and job row as the store returns them, plus the result files."""
    con = store.connection()
    corpora = {r["id"]: store.get_corpus(r["id"], None) for r in con.execute("SELECT id FROM corpora")}
    jobs = {r["id"]: store.get_job(r["id"], None) for r in con.execute("SELECT id FROM jobs")}
    results = {}
    for job_id, job in jobs.items():
        if job["result_dir"]:
            results[job_id] = {p.name: p.read_bytes() for p in store.path(job["result_dir"]).iterdir()}
    corpus_files_ = {cid: [p.read_bytes() for p in store.corpus_paths(c)] for cid, c in corpora.items()}
    return {"tokens": store.list_tokens(), "corpora": corpora, "jobs": jobs,
            "results": results, "corpus_files": corpus_files_}


def test_documented_backup_and_restore_finds_every_job_and_corpus(tmp_path):
    """Back up a data dir while the API holds it open (`burstlens backup`: SQLite online backup
    API of the store plus the blobs it names), lose the data dir, restore it as the guide says
    (`burstlens restore`): the service's store finds every token, corpus and job again with the
    same fields, the stored waveforms and result files are byte-identical, and the API serves
    the same filterbanks (SQLite documentation, "Using the SQLite Online Backup API"). The
    backup folder holds the store, the blobs and its manifest, and nothing is left behind."""
    data = tmp_path / "srv" / "burstlens"
    backup = tmp_path / "backup" / "burstlens-1"
    settings = settings_for(data)
    fast = dict(TINY, channels=4, evaluations=4, refine=False, bootstrap=0)
    with TestClient(create_app(settings)) as api:
        corpora = [api.post("/v1/corpora", files=corpus_files(2, seed=s)).json()["id"]
                   for s in (0, 10, 20)]
        done = [api.post("/v1/jobs", json={"corpus_id": corpora[i], "settings": fast}).json()["id"]
                for i in (0, 1)]
        Worker(settings).run(max_jobs=2, exit_when_idle=True)
        queued = api.post("/v1/jobs", json={"corpus_id": corpora[2], "settings": TINY}).json()["id"]
        cancelled = api.post("/v1/jobs", json={"corpus_id": corpora[2], "settings": fast}).json()["id"]
        assert api.post(f"/v1/jobs/{cancelled}/withdraw").status_code == 200
        states = {j: api.get(f"/v1/jobs/{j}").json()["state"] for j in (*done, queued, cancelled)}
        assert states == {done[0]: "done", done[1]: "done", queued: "waiting",
                          cancelled: "withdrawn"}
        filterbanks = {j: api.get(f"/v1/jobs/{j}/filterbank").json() for j in done}
        before = snapshot(api.app.state.store)

        run_block("backup", data, backup)  # online: the API's connection stays open
        assert {p.name for p in backup.iterdir()} == {"burstlens.sqlite3", "blobs", "manifest.json"}
        assert [p.name for p in backup.parent.iterdir() if p.name != backup.name] == [
            ".burstlens-backup-restore.lock"]   # no unfinished folder left beside it

        # after the backup: a change the restore must not bring back
        late = api.post("/v1/corpora", files=corpus_files(1, seed=30)).json()["id"]
    Store(data).close()
    shutil.rmtree(data)  # the disk is lost

    run_block("restore", data, backup)

    store = Store(data)
    after = snapshot(store)
    assert after == before
    assert late not in after["corpora"]
    assert set(after["jobs"]) == {*done, queued, cancelled}
    assert set(after["corpora"]) == set(corpora)
    with TestClient(create_app(settings)) as api:
        for job_id, filterbank in filterbanks.items():
            assert api.get(f"/v1/jobs/{job_id}/filterbank").json() == filterbank
        assert api.get(f"/v1/jobs/{queued}").json()["state"] == "waiting"
        assert {c: api.get(f"/v1/corpora/{c}").status_code for c in corpora} == dict.fromkeys(corpora, 200)

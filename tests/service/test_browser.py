"""The report page and the jobs page, rendered by the system Chromium through Playwright.

Chromium is Debian's (/usr/bin/chromium, installed by `make test`); no browser is downloaded.
Screenshots of every page land in the test's tmp_path (report.png, jobs.png, ...).
"""
from __future__ import annotations

import os
import re

import httpx
import numpy as np
import pytest
from burstlens.service.testing import TINY, corpus_files, wait_for

CHROMIUM = "/usr/bin/chromium"
LAUNCH_ARGS = ["--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
               "--disable-background-networking", "--disable-component-update", "--disable-sync",
               "--disable-dev-shm-usage"]  # small /dev/shm in CI containers

pytestmark = [
    pytest.mark.browser,
    pytest.mark.skipif(not os.access(CHROMIUM, os.X_OK),
                       reason=f"no system Chromium at {CHROMIUM} (`make test` installs Debian's)"),
]

# Every image loaded and decoded (naturalWidth > 0), per the HTML Living Standard img element.
IMAGES_JS = """() => Array.from(document.images).map(i => ({
    alt: i.alt, complete: i.complete, width: i.naturalWidth, src: i.src.slice(0, 22)}))"""

# Channel table rows as [field -> {value: data-value, text: shown}] (service/report/sections.py's table).
TABLE_JS = """() => Array.from(document.querySelectorAll('#channel-table tbody tr')).map(tr => {
    const row = {};
    tr.querySelectorAll('td[data-field]').forEach(td => {
        row[td.dataset.field] = {value: td.dataset.value, text: td.textContent.trim()};
    });
    return row;
})"""

# Every visible element with text of its own, as [text, contrast ratio] (WCAG 2.1 §1.4.3
# relative luminance) of its computed colour on its effective background: the first ancestor
# background that is not transparent, translucent ones blended over what lies beneath.
CONTRAST_JS = """() => {
  const rgba = s => { const m = s.match(/[\\d.]+/g).map(Number); return [m[0], m[1], m[2], m.length > 3 ? m[3] : 1]; };
  const lin = c => { c /= 255; return c <= 0.04045 ? c / 12.92 : Math.pow((c + 0.055) / 1.055, 2.4); };
  const lum = c => 0.2126 * lin(c[0]) + 0.7152 * lin(c[1]) + 0.0722 * lin(c[2]);
  const over = (top, under) => top.slice(0, 3).map((v, i) => v * top[3] + under[i] * (1 - top[3]));
  const background = el => {
    const layers = [];
    for (let e = el; e; e = e.parentElement) {
      const c = rgba(getComputedStyle(e).backgroundColor);
      if (c[3] > 0) { layers.push(c); if (c[3] >= 1) break; }
    }
    return layers.reverse().reduce((under, top) => over(top, under), [255, 255, 255]);
  };
  const out = [];
  for (const el of document.querySelectorAll('body *')) {
    const own = Array.from(el.childNodes).some(n => n.nodeType === 3 && n.textContent.trim());
    if (!own || !el.getClientRects().length || getComputedStyle(el).visibility === 'hidden') continue;
    const fg = over(rgba(getComputedStyle(el).color), background(el));
    const [a, b] = [lum(fg), lum(background(el))].sort((x, y) => y - x);
    out.push([el.textContent.trim().slice(0, 60), (a + 0.05) / (b + 0.05)]);
  }
  return out;
}"""


# A raw key: a snake_case identifier (lower-case words joined by underscores) standing alone,
# not part of a dotted Python path such as scipy.signal.resample_poly (common practice: PEP 8
# spells variables and dict keys this way, people do not).
RAW_KEY = re.compile(r"(?<![\w.])[a-z][a-z0-9]*(?:_[a-z0-9]+)+\b")


def raw_keys(text: str) -> list[str]:
    """The raw keys in a page's visible text."""
    return sorted(set(RAW_KEY.findall(text)))


def low_contrast(page) -> list:
    """Texts on the page under 4.5:1 (WCAG 2.1 §1.4.3, level AA), with their ratios."""
    return [(text, round(ratio, 2)) for text, ratio in page.evaluate(CONTRAST_JS) if ratio < 4.5]


@pytest.fixture(scope="module")
def browser():
    from playwright.sync_api import sync_playwright

    with sync_playwright() as playwright:
        chromium = playwright.chromium.launch(executable_path=CHROMIUM, headless=True,
                                              args=LAUNCH_ARGS)
        yield chromium
        chromium.close()


class Console:
    """Collects console errors, uncaught page errors and every requested URL of one page."""

    def __init__(self, page):
        self.errors: list[str] = []
        self.requests: list[str] = []
        page.on("console", lambda msg: msg.type == "error" and self.errors.append(msg.text))
        page.on("pageerror", lambda exc: self.errors.append(str(exc)))
        page.on("request", lambda request: self.requests.append(request.url))

    def foreign(self, *origins: str) -> list[str]:
        """Requested URLs outside ``origins`` and inline schemes (an external asset)."""
        return [u for u in self.requests if not u.startswith(("data:", "blob:", *origins))]


def tiny_fit():
    """A real FilterbankSearch on a small generated corpus of Gaussian tone bursts in noise,
    each window with a UTC start, a SEED id and a trigger onset as the reader records them."""
    from burstlens.search import FilterbankSearch
    from burstlens.search.corpus import Corpus

    fs, n, m = 1000.0, 256, 8
    t = np.arange(n) / fs
    rng = np.random.default_rng(1)
    windows = np.array([np.exp(-0.5 * ((t - 0.12) / 0.02) ** 2) * np.cos(2 * np.pi * (80 + 30 * k) * (t - 0.12))
                        + 0.02 * rng.standard_normal(n) for k in range(m)])
    # a server path in the file names: the page must show SEED ids and UTC times instead
    path = "/srv/burstlens/data/blobs/3f/bursts.npz"
    corpus = Corpus(windows=windows, sampling_rate_hz=fs,
                    window_meta=[{"file": path, "trace_id": "XX.T01..HHZ",
                                  "start": f"2026-03-17T02:00:{10 + 0.5 * k:06.3f}000Z",
                                  "offset_s": 0.5 * k, "trigger_offset_s": 0.064} for k in range(m)],
                    traces=[{"file": path, "trace_id": "XX.T01..HHZ", "sampling_rate_hz": fs,
                             "start": "2026-03-17T02:00:10.000000Z", "duration_s": 4.0,
                             "windows": m}],
                    rejections=[{"file": "bursts.npz", "trace_id": "XX.T01..HHZ", "offset_s": 3.9,
                                 "reason": "flat", "detail": "constant samples"}],
                    defaults={"windowing": "bursts", "window_s": n / fs}, source_hash="5e" * 32,
                    files=[path])
    search = FilterbankSearch(channels=6, evaluations=8, bootstrap=2, seed=3).fit(corpus)
    return search, corpus


def test_report_from_disk_renders_every_image_and_the_channel_table(browser, tmp_path):
    """The report written to disk and opened as file:// at 1280 × 800 shows the scorecard and
    the warnings above the fold, a SEED id and a UTC time in the first example's title and no
    server path, no raw key in its visible text, every text at 4.5:1 contrast or more (WCAG
    2.1 §1.4.3), every plot (naturalWidth > 0) and a channel table equal to the filterbank
    JSON; it logs no console error and requests nothing beyond the file (HTML Living Standard
    img decoding; docs/design.md §8 channel fields)."""
    from burstlens.service.report import render_report

    search, corpus = tiny_fit()
    filterbank = search.filterbank_.to_json()
    path = tmp_path / "report.html"
    path.write_text(render_report(filterbank, search.diagnostics_, corpus.windows,
                                  corpus.sampling_rate_hz), encoding="utf-8")
    page = browser.new_page(viewport={"width": 1280, "height": 800})
    console = Console(page)
    page.goto(path.as_uri())
    page.wait_for_load_state("load")
    page.screenshot(path=str(tmp_path / "report-fold.png"))
    # the answer is above the fold: what was tuned, the scorecard, the gain in words, the
    # warnings box
    for selector in ("#tuned", "#scorecard", "#gain", "#warnings"):
        box = page.locator(selector).bounding_box()
        assert box is not None and box["y"] + box["height"] <= 800, (selector, box)
    # the first example names its window by SEED id and UTC time, never by server path
    examples = page.inner_text("#plot-examples figcaption")
    first = examples.split("Row 2")[0]
    assert "XX.T01..HHZ" in first and re.search(r"2026-03-17 02:00:\d\d\.\d{3} UTC", first), first
    assert "/srv/" not in page.inner_text("body")
    assert "windows the fit never saw" in page.inner_text("#gain")
    assert page.locator("#warnings").is_visible()  # 8 windows: fewer than 30 held out
    assert page.evaluate("() => document.querySelector('details#details').open") is False
    assert page.locator("details#details h3").first.is_hidden()
    assert low_contrast(page) == []
    page.click("details#details > summary")  # the folded settings are readable too
    assert low_contrast(page) == []
    assert raw_keys(page.inner_text("body")) == []
    images = page.evaluate(IMAGES_JS)
    assert len(images) == 5  # tiling, examples, convergence, channels, baselines
    for image in images:
        assert image["complete"] and image["width"] > 0, image
        assert image["alt"].strip() and image["src"].startswith("data:image/png;base64")
    rows = page.evaluate(TABLE_JS)
    assert len(rows) == len(filterbank["channels"])
    for row, channel in zip(rows, filterbank["channels"], strict=True):
        for field in ("center_hz", "time_spread_s", "cell_area", "chirp_hz_per_s"):
            assert float(row[field]["value"]) == channel[field]
        assert float(row["center_hz"]["text"]) == pytest.approx(channel["center_hz"], rel=1e-4)
        # shown as the Gaussian window's std s = √2·σ_t in ms (docs/design.md §3: |h|² has std σ_t)
        assert float(row["time_spread_s"]["text"]) == \
            pytest.approx(1e3 * 2 ** 0.5 * channel["time_spread_s"], rel=1e-2)
        assert row["equivalent"]["text"] == channel["equivalent"]["text"]
    assert "not a certified safety" in page.inner_text("#cautions")
    page.screenshot(path=str(tmp_path / "report.png"), full_page=True)
    assert console.errors == []
    assert console.foreign(path.as_uri()) == []  # nothing loaded but the file itself
    page.close()


def _upload_and_submit(url: str, headers: dict, settings: dict) -> str:
    with httpx.Client(base_url=url, headers=headers, timeout=30.0) as client:
        corpus = client.post("/v1/corpora", files=corpus_files(2))
        assert corpus.status_code == 201, corpus.text
        job = client.post("/v1/jobs", json={"corpus_id": corpus.json()["id"], "settings": settings})
        assert job.status_code == 201, job.text
        return job.json()["id"]


def _row_state(page, job_id: str) -> str | None:
    return page.evaluate("id => { const r = document.querySelector(`tr[data-job-id=\"${id}\"]`);"
                         " return r ? r.dataset.state : null; }", job_id)


def test_jobs_page_with_a_token_follows_a_job_to_succeeded_and_opens_its_report(
        browser, live_server, tmp_path):
    """With tokens stored, GET / answers the API's 401 by asking for a bearer token (again, with
    a reason, after a wrong one), keeps it in sessionStorage only so a reload does not ask again;
    a job submitted after the page loaded appears without a reload and its row moves to
    `succeeded` by polling, while Cancel moves a second, queued job to `cancelled`; the report
    link fetches the page with the token and every image renders (RFC 6750 bearer tokens;
    docs/design.md §7 job states)."""
    from burstlens.service.auth import create_token
    from burstlens.service.store import Store

    data_dir = tmp_path / "data"
    token = create_token(Store(data_dir), "browser-test")
    auth = {"Authorization": f"Bearer {token}"}
    server = live_server(workers=1, data_dir=data_dir)
    page = browser.new_page(viewport={"width": 1280, "height": 720})
    console = Console(page)
    page.goto(server.url + "/")
    page.wait_for_selector("#token-panel:not([hidden])")
    page.screenshot(path=str(tmp_path / "jobs-token.png"))
    assert low_contrast(page) == []
    page.fill("#token-input", "bl_wrong")
    page.click("#token-panel button[type=submit]")
    page.wait_for_selector("#token-error:not([hidden])")  # rejected: asked again, with a reason
    assert page.evaluate("() => sessionStorage.getItem('burstlens.token')") is None
    page.fill("#token-input", token)
    page.click("#token-panel button[type=submit]")
    page.wait_for_selector("#empty:not([hidden])")  # listed, nothing yet
    assert page.evaluate("() => sessionStorage.getItem('burstlens.token')") == token
    assert page.evaluate("() => localStorage.length") == 0
    page.reload()
    page.wait_for_selector("#empty:not([hidden])")
    assert page.locator("#token-panel").is_hidden()

    job_id = _upload_and_submit(server.url, auth, TINY)
    queued_id = _upload_and_submit(server.url, auth, {**TINY, "seed": 4})  # waits for the worker
    page.click(f'tr[data-job-id="{queued_id}"] button.withdraw')
    seen = []

    def state():
        value = _row_state(page, job_id)
        if value and (not seen or seen[-1] != value):
            seen.append(value)
            if value == "working":
                page.screenshot(path=str(tmp_path / "jobs-running.png"))
        return value in ("done", "error", "withdrawn")

    wait_for(state, timeout=120.0, interval=0.2)
    assert seen[-1] == "done", seen
    assert set(seen) <= {"waiting", "working", "done"}
    page.wait_for_selector(f'tr[data-job-id="{queued_id}"][data-state="withdrawn"]', timeout=30000)
    row = page.locator(f'tr[data-job-id="{job_id}"]')
    assert row.locator(".state").inner_text() == "done"
    assert re.search(r"[+-]\d\.\d{3} bits", row.inner_text())  # gain over the spectrogram
    assert row.locator("button.withdraw").count() == 0
    page.screenshot(path=str(tmp_path / "jobs.png"), full_page=True)
    assert low_contrast(page) == []  # succeeded and cancelled rows, links, buttons
    link = row.locator("a.report-link")
    assert link.get_attribute("href") == f"/v1/jobs/{job_id}/report"
    with page.expect_popup() as popup:
        link.click()
    report_page = popup.value
    report_console = Console(report_page)
    report_page.wait_for_selector("#channel-table")
    report_page.wait_for_load_state("load")
    images = report_page.evaluate(IMAGES_JS)
    assert len(images) == 5 and all(i["complete"] and i["width"] > 0 for i in images), images
    with httpx.Client(base_url=server.url, headers=auth) as client:
        filterbank = client.get(f"/v1/jobs/{job_id}/filterbank").json()
    rows = report_page.evaluate(TABLE_JS)
    assert [float(r["center_hz"]["value"]) for r in rows] == \
        [c["center_hz"] for c in filterbank["channels"]]
    report_page.screenshot(path=str(tmp_path / "job-report.png"), full_page=True)
    assert report_console.errors == []
    assert report_console.foreign(server.url + "/") == []  # the report loads nothing else
    # the 401 answers before the token was given are the protocol at work, not page errors
    assert [e for e in console.errors if "401" not in e] == []
    report_page.close()
    page.close()


def test_jobs_page_without_tokens_lists_and_cancels_a_queued_job(browser, live_server, tmp_path):
    """A loopback server without tokens needs none: GET / lists a queued job at once (no token
    prompt, no report link yet), its Cancel button moves it to `cancelled`, and the page loads
    nothing but its own origin (docs/design.md §7)."""
    server = live_server(workers=0)  # no worker: the job stays queued
    job_id = _upload_and_submit(server.url, {}, TINY)
    page = browser.new_page(viewport={"width": 1280, "height": 720})
    console = Console(page)
    page.goto(server.url + "/")
    row = f'tr[data-job-id="{job_id}"]'
    page.wait_for_selector(f'{row}[data-state="waiting"]')
    assert page.locator("#token-panel").is_hidden()
    assert page.locator(f"{row} a.report-link").count() == 0
    assert "waiting for a worker" in page.inner_text(row)
    assert low_contrast(page) == []
    page.click(f"{row} button.withdraw")
    page.wait_for_selector(f'{row}[data-state="withdrawn"]', timeout=15000)
    with httpx.Client(base_url=server.url) as client:
        assert client.get(f"/v1/jobs/{job_id}").json()["state"] == "withdrawn"
    assert page.locator(f"{row} button.withdraw").count() == 0
    page.screenshot(path=str(tmp_path / "jobs-cancelled.png"), full_page=True)
    assert console.errors == []
    assert console.foreign(server.url + "/") == []  # no external asset: only its own API
    page.close()

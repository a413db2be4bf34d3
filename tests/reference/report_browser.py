"""Opens the report in the Debian Chromium (headless, driven by playwright)
with the network cut off, and writes what the page shows.

Reads <out>/input.json ({"report", "chromium", "screenshot", "profile"});
writes <out>/result.json: console errors, page errors, failed and blocked
requests, the summary values by key, the positions that have a plot, the
flagged frames and how many of their overlays loaded.
"""

import json
import sys
from pathlib import Path

from playwright.sync_api import sync_playwright

out = Path(sys.argv[1])
spec = json.loads((out / "input.json").read_text())
report_url = Path(spec["report"]).resolve().as_uri()
flags = [
    "--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
    "--disable-component-update", "--no-first-run", "--disable-sync",
]
result = {"console_errors": [], "page_errors": [], "failed_requests": [], "blocked_requests": []}
with sync_playwright() as p:
    context = p.chromium.launch_persistent_context(
        spec["profile"], executable_path=spec["chromium"], headless=True, args=flags,
        viewport={"width": 1400, "height": 900}, offline=True,
    )
    page = context.new_page()

    def route(r):
        if r.request.url == report_url:
            r.continue_()
        else:
            result["blocked_requests"].append(r.request.url)
            r.abort()

    context.route("**/*", route)
    page.on("console", lambda m: m.type == "error" and result["console_errors"].append(m.text))
    page.on("pageerror", lambda e: result["page_errors"].append(str(e)))
    page.on("requestfailed", lambda r: result["failed_requests"].append(f"{r.url}: {r.failure}"))
    page.goto(report_url, wait_until="load")
    result["summary"] = page.eval_on_selector_all(
        "dd[data-key]", "els => Object.fromEntries(els.map(e => [e.dataset.key, e.textContent]))")
    result["positions_with_plot"] = page.eval_on_selector_all(
        "figure.position", "els => els.filter(e => e.querySelector('svg')).map(e => e.dataset.position)")
    result["flagged"] = page.eval_on_selector_all(".pair.flagged", "els => els.map(e => e.dataset.frameId)")
    result["overlays_loaded"] = page.eval_on_selector_all(
        ".pair.flagged img.overlay",
        "els => els.filter(e => e.complete && e.naturalWidth > 0).map(e => e.dataset.frameId)")
    page.screenshot(path=spec["screenshot"], full_page=True)
    context.close()
(out / "result.json").write_text(json.dumps(result))

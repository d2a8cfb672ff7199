"""End to end in a real browser: JupyterLab + headless Chromium (Playwright).

Runs a light variant of ``notebooks/01_demo_walkthrough.ipynb`` (the
explorer, a three-radius scan and a three-site disorder sample with the fast
preset; the export is left out) at 1440 × 900 and checks in the page that

* the radius slider drives a re-carve: the environment-molecule count
  shown by the explorer changes,
* the nglview canvas rendered (non-blank pixels in its screenshot),
* the convergence plot appeared while the scan ran and the histogram after
  the sample,
* the explorer, its legend included, fits the screen's height,
* no label, button or tab title of the panels is cut short (its scroll
  width is not larger than its box),
* a bad radius typed into the scan panel gives a one-line message and no
  traceback.

Screenshots go to ``artifacts/browser/`` (git-ignored): explorer, scan panel
live and finished, disorder panel. With ``CLUSTERLAB_DOC_SCREENSHOTS=1`` the
test also writes the README's copies (downscaled palette PNGs) into
``docs/screenshots/``. Chromium is Debian's package
(``.ci/install_browser.sh``); the test is skipped only where
/usr/bin/chromium is missing outside CI.
"""

from __future__ import annotations

import json
import os
import re
import shutil
import time
from pathlib import Path

import pytest

from browser_helpers import (CHROMIUM, CHROMIUM_ARGS, REPO, TRUNCATED_JS, lab_server, non_blank_fraction,
                             save_doc_png)

pytestmark = [pytest.mark.browser, pytest.mark.slow]

ARTIFACTS = REPO / "artifacts" / "browser"
WALKTHROUGH = REPO / "notebooks" / "01_demo_walkthrough.ipynb"
DOC_SHOTS = REPO / "docs" / "screenshots"
#: artefact -> README copy
DOC_COPIES = {"explorer.png": "explorer.png", "scan_live.png": "scan_panel_live.png",
              "scan_finished.png": "scan_panel_finished.png", "disorder.png": "disorder_panel.png"}
VIEWPORT = {"width": 1440, "height": 900}

if not os.path.exists(CHROMIUM) and not os.environ.get("CI"):
    pytest.skip(f"{CHROMIUM} is not installed (run .ci/install_browser.sh); in CI this test runs",
                allow_module_level=True)


def light_walkthrough(dest: Path) -> Path:
    """The walkthrough up to and including its disorder sample: a scan of three
    radii (the plot of the first appears while the others run) and three sites."""
    import nbformat

    nb = nbformat.read(WALKTHROUGH, as_version=4)
    cells = []
    for cell in nb.cells:
        if cell.cell_type == "markdown" and cell.source.lstrip().startswith("## 5."):
            break
        cells.append(cell)
    text = "\n".join(c.source for c in cells)
    assert "ShiftScanPanel(" in text and "FilmExplorer(" in text and "DisorderPanel(" in text, \
        "walkthrough layout changed"
    for cell in cells:
        if "ShiftScanPanel(" in cell.source:
            cell.source = re.sub(r"radii_A=\([^)]*\)", "radii_A=(6.0, 9.0, 12.0)", cell.source)
        cell.outputs = [] if cell.cell_type == "code" else getattr(cell, "outputs", None)
        if cell.cell_type == "code":
            cell.execution_count = None
    nb.cells = cells
    nbformat.write(nb, dest)
    return dest


_ERROR_JS = "() => { const e = document.querySelector('[data-mime-type=\"application/vnd.jupyter.error\"]');" \
            " return e ? e.textContent : null; }"


def wait_or_error(page, condition_js: str, timeout_s: float, arg=None) -> None:
    """Wait for ``condition_js`` to be true; fail at once, with the traceback
    text, when a cell shows an error."""
    import time

    t_end = time.monotonic() + timeout_s
    while True:
        if page.evaluate(condition_js, arg):
            return
        err = page.evaluate(_ERROR_JS)
        if err:
            raise AssertionError(f"a notebook cell failed:\n{err[-3000:]}")
        if time.monotonic() > t_end:
            raise TimeoutError(f"not true after {timeout_s} s: {condition_js}")
        page.wait_for_timeout(500)


def _scan_state_js() -> str:
    return ("() => { const p = document.querySelector('.clusterlab-scan-panel');"
            " const bar = p && p.querySelector('progress, .progress-bar');"
            " const run = p && [...p.querySelectorAll('button')].find(b => b.textContent.includes('run scan'));"
            " return {running: !!run && run.disabled,"
            " status: (p && p.querySelector('.clusterlab-status') || {}).textContent || ''}; }")


def panel_screenshot(page, panel, path: Path) -> None:
    """Screenshot of a whole panel: the window grows (same width) while a panel
    is taller than it, since the notebook scrolls inside the page and a
    screenshot shows only what is on screen; then it is 1440 × 900 again."""
    panel.scroll_into_view_if_needed()
    height = panel.bounding_box()["height"]
    if height > VIEWPORT["height"] - 160:
        page.set_viewport_size({"width": VIEWPORT["width"], "height": int(min(height + 260, 3000))})
        page.wait_for_timeout(800)
        panel.scroll_into_view_if_needed()
    try:
        panel.screenshot(path=str(path))
    finally:
        page.set_viewport_size(VIEWPORT)
        page.wait_for_timeout(300)


def drawn_canvas(page, canvas, path: Path, timeout_s: float = 40.0) -> tuple[float, int]:
    """Screenshot a WebGL canvas until something is drawn on it (software WebGL on a busy machine can
    take many seconds for a film of thousands of atoms); returns the last (fraction, colours)."""
    deadline = time.monotonic() + timeout_s
    while True:
        fraction, colours = non_blank_fraction(canvas.screenshot(path=str(path)))
        if (fraction > 0.02 and colours > 20) or time.monotonic() > deadline:
            return fraction, colours
        page.wait_for_timeout(1000)


def type_into(page, locator, text: str) -> None:
    locator.click()
    page.keyboard.press("Control+A")
    page.keyboard.type(text)
    page.keyboard.press("Enter")


def check_bad_radius(page, scan, text: str) -> dict:
    """Type ``text`` into the scan panel's radii box and press run: returns the
    status text, the error box text and whether the page shows a traceback."""
    box = scan.locator(".clusterlab-radii input").first
    type_into(page, box, text)
    scan.locator("button", has_text="run scan").first.click()
    page.wait_for_function(
        "() => { const s = document.querySelector('.clusterlab-scan-panel .clusterlab-status');"
        " return !!s && s.textContent.includes('check the settings'); }", timeout=30_000)
    page.wait_for_timeout(500)
    status = scan.locator(".clusterlab-status").first
    return {"status": status.inner_text(), "status_height": status.bounding_box()["height"],
            "errors": page.evaluate("() => [...document.querySelectorAll('.clusterlab-scan-panel .widget-output')]"
                                    ".map(e => e.innerText).join('\\n')"),
            "traceback": "Traceback" in page.inner_text("body")}


def drive(server, notebook: str, artifacts: Path, *, run_timeout_s: float = 600.0) -> dict:
    """Open ``notebook``, run all, and check the explorer, view, plots, labels and a bad radius.

    Returns measurements (counts before/after, canvas pixel stats, truncated labels, sizes)."""
    from playwright.sync_api import sync_playwright

    artifacts.mkdir(parents=True, exist_ok=True)
    out: dict = {}
    with sync_playwright() as p:
        browser = p.chromium.launch(executable_path=CHROMIUM, args=CHROMIUM_ARGS, headless=True)
        try:
            page = browser.new_page(viewport=VIEWPORT)
            console: list[str] = []
            page.on("console", lambda m: console.append(f"{m.type}: {m.text}"))
            page.goto(server.lab_url(notebook))
            page.wait_for_selector(".jp-NotebookPanel .jp-Cell", timeout=90_000)
            # "Run All" can fire before the kernel is connected: wait for it first
            server.wait_kernel_idle(notebook, timeout_s=120.0)
            page.wait_for_function("() => !!window.jupyterapp", timeout=30_000)
            # the whole width for the notebook: no file browser beside it
            page.evaluate("() => { const a = window.jupyterapp; if (!a.shell.leftCollapsed)"
                          " a.commands.execute('application:toggle-left-area'); }")
            # not awaited: the command's promise ends with the last cell, and the scan must be watched live
            page.evaluate("() => { window.jupyterapp.commands.execute('notebook:run-all-cells'); }")

            count = page.locator(".clusterlab-explorer .clusterlab-environment-molecules").first
            wait_or_error(page, "() => !!document.querySelector("
                          "'.clusterlab-explorer .clusterlab-environment-molecules')", 180.0)

            # the scan panel while the scan runs: its first radius plotted, the others still to come
            wait_or_error(page, "() => { const i = document.querySelector('.clusterlab-scan-panel img');"
                          " return !!i && i.naturalWidth > 0; }", run_timeout_s)
            scan = page.locator(".clusterlab-scan-panel").first
            scan.scroll_into_view_if_needed()
            out["scan_live_state"] = page.evaluate(_scan_state_js())
            panel_screenshot(page, scan, artifacts / "scan_live.png")

            server.wait_kernel_idle(notebook, timeout_s=run_timeout_s)
            page.screenshot(path=str(artifacts / "01_after_run_all.png"), full_page=True)
            panel_screenshot(page, scan, artifacts / "scan_finished.png")
            out["scan_finished_state"] = page.evaluate(_scan_state_js())
            out["plot_width"] = page.evaluate(
                "() => document.querySelector('.clusterlab-scan-panel img').naturalWidth")

            disorder = page.locator(".clusterlab-disorder-panel").first
            out["hist_width"] = page.evaluate(
                "() => { const i = document.querySelector('.clusterlab-disorder-panel img');"
                " return i ? i.naturalWidth : 0; }")
            panel_screenshot(page, disorder, artifacts / "disorder.png")
            # the site energies on the film (the tab's 3D view), for a look at the colour scale
            disorder.locator(".lm-TabBar-tab", has_text="on the film").first.click()
            page.wait_for_timeout(2500)
            disorder.screenshot(path=str(artifacts / "08_disorder_on_the_film.png"))
            disorder.locator(".lm-TabBar-tab", has_text="histogram").first.click()
            out["broken_images"] = page.evaluate(
                "() => [...document.querySelectorAll('.clusterlab-panel img')]"
                ".filter(i => i.offsetParent && !(i.naturalWidth > 0)).length")

            explorer = page.locator(".clusterlab-explorer").first
            explorer.scroll_into_view_if_needed()
            canvas = explorer.locator("canvas").first
            out["canvas_fraction"], out["canvas_colours"] = drawn_canvas(page, canvas, artifacts / "03_view_canvas.png")
            explorer.screenshot(path=str(artifacts / "explorer.png"))
            box = explorer.bounding_box()
            legend = explorer.locator(".clusterlab-legend").first.bounding_box()
            out["explorer_height"] = box["height"]
            out["legend_bottom"] = legend["y"] + legend["height"] - box["y"]

            # every label of every panel, all tabs' titles included
            out["truncated"] = page.evaluate(TRUNCATED_JS)
            (artifacts / "labels_checked.txt").write_text(str(out["truncated"]))

            # move the radius slider: type a new value into its readout
            before = count.inner_text().strip()
            out["count_before"] = before
            type_into(page, explorer.locator(".clusterlab-radius .widget-readout").first, "16")
            page.wait_for_function(
                "(b) => { const e = document.querySelector("
                "'.clusterlab-explorer .clusterlab-environment-molecules');"
                " return !!e && e.textContent.trim() !== b; }", arg=before, timeout=60_000)
            out["count_after"] = count.inner_text().strip()
            page.wait_for_timeout(1500)
            explorer.screenshot(path=str(artifacts / "05_explorer_after_slider.png"))
            out["canvas_fraction_after"], _ = drawn_canvas(page, canvas, artifacts / "06_view_canvas_after.png")

            # bad radii: one line in the status, no traceback anywhere
            scan.scroll_into_view_if_needed()
            out["bad_radius"] = [check_bad_radius(page, scan, t) for t in ("abc", "-3")]
            scan.screenshot(path=str(artifacts / "07_scan_bad_radius.png"))
            out["page_text"] = page.inner_text("body")
            out["console"] = console
        except Exception:
            # keep what the page showed for the artefacts
            try:
                page.screenshot(path=str(artifacts / "99_failure.png"), full_page=True)
                (artifacts / "console.txt").write_text("\n".join(console))
            except Exception:  # noqa: BLE001
                pass
            raise
        finally:
            browser.close()
    return out


def test_walkthrough_in_jupyterlab(tmp_path):
    if not os.path.exists(CHROMIUM):
        pytest.fail(f"{CHROMIUM} is missing in CI; .ci/install_browser.sh must install Debian's chromium")
    if ARTIFACTS.exists():
        shutil.rmtree(ARTIFACTS)
    root = tmp_path / "serve"
    root.mkdir()
    light_walkthrough(root / "walkthrough.ipynb")
    with lab_server(root, tmp_path / "scratch") as server:
        res = drive(server, "walkthrough.ipynb", ARTIFACTS)
        shutil.copy(server.log, ARTIFACTS / "jupyterlab.log")
    (ARTIFACTS / "console.txt").write_text("\n".join(res["console"]))
    (ARTIFACTS / "measurements.json").write_text(json.dumps(
        {k: v for k, v in res.items() if k not in ("page_text", "console")}, indent=1, default=str))
    text = res["page_text"]
    for bad in ("Error displaying widget", "Failed to load model class", "Traceback"):
        assert bad not in text, f"page shows {bad!r}; see {ARTIFACTS}"
    assert res["count_after"] != res["count_before"]
    assert int(res["count_after"]) > int(res["count_before"])  # radius 10 -> 16 Å takes more molecules in
    assert res["canvas_fraction"] > 0.02 and res["canvas_colours"] > 20, res
    assert res["canvas_fraction_after"] > 0.02, res
    assert res["plot_width"] > 100
    # the live screenshot shows a running scan, the finished one a verdict
    assert res["scan_live_state"]["running"], res["scan_live_state"]
    assert not res["scan_finished_state"]["running"] and "finished" in res["scan_finished_state"]["status"]
    assert res["hist_width"] > 100
    assert res["broken_images"] == 0
    # the explorer and its legend fit a 900 px high screen
    assert res["explorer_height"] <= VIEWPORT["height"], res["explorer_height"]
    assert res["legend_bottom"] <= VIEWPORT["height"]
    # the three panels show about 70 labels, buttons and tab titles: the check saw them
    assert res["truncated"]["checked"] > 50, res["truncated"]
    assert res["truncated"]["cut"] == [], "labels cut short: " + "; ".join(
        f"{t['text']!r} ({t['scroll']} > {t['client']} px)" for t in res["truncated"]["cut"])
    for bad in res["bad_radius"]:
        assert "check the settings" in bad["status"] and "\n" not in bad["status"].strip(), bad
        assert not bad["traceback"], bad
        assert "Traceback" not in bad["errors"], bad
    if os.environ.get("CLUSTERLAB_DOC_SCREENSHOTS") == "1":
        sizes = {dest: save_doc_png(ARTIFACTS / src, DOC_SHOTS / dest) for src, dest in DOC_COPIES.items()}
        assert max(sizes.values()) < 400_000, sizes


def test_long_paths_stay_inside_the_side_box():
    """A carve error naming a long file path wraps inside the explorer's 330 px
    readout instead of running out of it (static page, the readout's own HTML)."""
    from playwright.sync_api import sync_playwright

    from clusterlab.widgets import _style

    path = "/data/larkspur/interlayer_runs/" + "/".join(["equilibration_stage_b"] * 6) + "/film.psf"
    box = _style.readout_html([("central molecule", "12 (BTH, C8H6S2)")], [f"file {path} has no box"],
                              [f"FilmError: {path}: frame 40 is not in the file"])
    with sync_playwright() as p:
        browser = p.chromium.launch(executable_path=CHROMIUM, args=CHROMIUM_ARGS, headless=True)
        try:
            page = browser.new_page(viewport=VIEWPORT)
            page.set_content(f'<div id="side" style="width:330px">{box}</div>')
            size = page.evaluate("() => { const e = document.querySelector('.clusterlab-readout');"
                                 " return {scroll: e.scrollWidth, client: e.clientWidth,"
                                 " outer: document.getElementById('side').scrollWidth}; }")
        finally:
            browser.close()
    assert len(path) > 150
    assert size["scroll"] <= size["client"] + 1 and size["outer"] <= 331, size


def test_truncation_check_finds_a_cut_label():
    """The page check itself, on a static page: a button too narrow for its text
    (cut with an ellipsis, as ipywidgets cuts descriptions) is listed, one that
    fits and one hidden are not."""
    from playwright.sync_api import sync_playwright

    page_html = """<div class="clusterlab-panel">
      <button style="width:60px;overflow:hidden;white-space:nowrap;text-overflow:ellipsis">export for transport</button>
      <button style="width:auto">fits</button>
      <div style="display:none"><button style="width:20px;overflow:hidden">hidden one</button></div>
      <label class="widget-label" style="display:inline-block;width:50px;overflow:hidden;white-space:nowrap">
        centroid within radius</label></div>"""
    with sync_playwright() as p:
        browser = p.chromium.launch(executable_path=CHROMIUM, args=CHROMIUM_ARGS, headless=True)
        try:
            page = browser.new_page(viewport=VIEWPORT)
            page.set_content(page_html)
            res = page.evaluate(TRUNCATED_JS)
        finally:
            browser.close()
    assert res["checked"] == 3  # the hidden button is skipped
    assert sorted(t["text"] for t in res["cut"]) == ["centroid within radius", "export for transport"]

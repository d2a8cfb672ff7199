"""Helpers of the real-browser test: a private JupyterLab server and a
headless Chromium driven by Playwright.

The server runs on 127.0.0.1 on a free port with a random token; HOME and
every Jupyter config/data/runtime/settings folder point into a scratch
folder, so the user's own Jupyter setup is never read or written.
"""

from __future__ import annotations

import contextlib
import io
import json
import os
import secrets
import socket
import subprocess
import sys
import time
import urllib.error
import urllib.request
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import numpy as np

CHROMIUM = "/usr/bin/chromium"
CHROMIUM_ARGS = ["--headless", "--no-sandbox", "--disable-gpu", "--enable-unsafe-swiftshader", "--disable-quic", "--no-first-run",
                 "--disable-background-networking", "--disable-component-update", "--disable-sync"]
REPO = Path(__file__).resolve().parents[1]


def free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


@dataclass
class LabServer:
    url: str
    token: str
    root: Path
    log: Path
    proc: subprocess.Popen

    def api(self, path: str) -> object:
        req = urllib.request.Request(f"{self.url}{path}", headers={"Authorization": f"token {self.token}"})
        with urllib.request.urlopen(req, timeout=10) as r:
            return json.loads(r.read().decode())

    def lab_url(self, notebook: str) -> str:
        return f"{self.url}/lab/tree/{notebook}?token={self.token}&reset"

    def kernel_of(self, notebook: str) -> dict | None:
        """The kernel model (``execution_state``, ``connections``) of the
        session of ``notebook``, or None while there is none."""
        for s in self.api("/api/sessions"):  # type: ignore[union-attr]
            if s.get("path", "").endswith(notebook) and s.get("kernel"):
                return self.api(f"/api/kernels/{s['kernel']['id']}")  # type: ignore[return-value]
        return None

    def wait_kernel_idle(self, notebook: str, timeout_s: float = 120.0, *, settle_s: float = 1.0) -> dict:
        """Wait until the notebook's kernel is connected (a websocket open)
        and idle, and stays so for ``settle_s``."""
        t_end = time.monotonic() + timeout_s
        since = None
        last: dict | None = None
        while time.monotonic() < t_end:
            try:
                last = self.kernel_of(notebook)
            except (urllib.error.URLError, OSError):
                last = None
            ok = bool(last) and last.get("execution_state") == "idle" and int(last.get("connections", 0)) >= 1
            if ok:
                since = since or time.monotonic()
                if time.monotonic() - since >= settle_s:
                    return last  # type: ignore[return-value]
            else:
                since = None
            time.sleep(0.25)
        raise TimeoutError(f"kernel of {notebook} not connected and idle after {timeout_s} s: {last}")


def _scratch_env(scratch: Path) -> dict[str, str]:
    env = dict(os.environ)
    dirs = {
        "HOME": scratch / "home",
        "JUPYTER_CONFIG_DIR": scratch / "jupyter" / "config",
        "JUPYTER_DATA_DIR": scratch / "jupyter" / "data",
        "JUPYTER_RUNTIME_DIR": scratch / "jupyter" / "runtime",
        "JUPYTERLAB_SETTINGS_DIR": scratch / "jupyter" / "lab-settings",
        "JUPYTERLAB_WORKSPACES_DIR": scratch / "jupyter" / "lab-workspaces",
        "IPYTHONDIR": scratch / "ipython",
        "MPLCONFIGDIR": scratch / "mpl",
    }
    for k, d in dirs.items():
        d.mkdir(parents=True, exist_ok=True)
        env[k] = str(d)
    # no news popup, no update check
    note = dirs["JUPYTERLAB_SETTINGS_DIR"] / "@jupyterlab" / "apputils-extension"
    note.mkdir(parents=True, exist_ok=True)
    (note / "notification.jupyterlab-settings").write_text(
        json.dumps({"fetchNews": "false", "checkForUpdates": False}))
    # every cell stays in the page (no windowing), so that panels out of view can be checked and watched
    tracker = dirs["JUPYTERLAB_SETTINGS_DIR"] / "@jupyterlab" / "notebook-extension"
    tracker.mkdir(parents=True, exist_ok=True)
    (tracker / "tracker.jupyterlab-settings").write_text(json.dumps({"windowingMode": "none"}))
    env["PYTHONPATH"] = os.pathsep.join(filter(None, [str(REPO), os.environ.get("PYTHONPATH")]))
    env.setdefault("OMP_NUM_THREADS", "2")
    return env


@contextlib.contextmanager
def lab_server(root: Path, scratch: Path, *, timeout_s: float = 120.0) -> Iterator[LabServer]:
    """Run ``jupyter lab`` serving ``root`` until the block ends."""
    port = free_port()
    token = secrets.token_hex(16)
    env = _scratch_env(scratch)
    log = scratch / "jupyterlab.log"
    cmd = [sys.executable, "-m", "jupyterlab", "--no-browser", "--ip=127.0.0.1", f"--port={port}",
           f"--IdentityProvider.token={token}", f"--ServerApp.root_dir={root}",
           "--ServerApp.port_retries=0", "--LabApp.expose_app_in_browser=True",
           "--ServerApp.disable_check_xsrf=False"]
    if hasattr(os, "geteuid") and os.geteuid() == 0:  # CI containers run as root
        cmd.append("--allow-root")
    fh = open(log, "wb")
    proc = subprocess.Popen(cmd, env=env, stdout=fh, stderr=subprocess.STDOUT, cwd=str(root))
    server = LabServer(url=f"http://127.0.0.1:{port}", token=token, root=root, log=log, proc=proc)
    try:
        t_end = time.monotonic() + timeout_s
        while True:
            if proc.poll() is not None:
                raise RuntimeError(f"jupyter lab exited ({proc.returncode}):\n{log.read_text()[-3000:]}")
            try:
                server.api("/api/status")
                break
            except (urllib.error.URLError, OSError, json.JSONDecodeError):
                if time.monotonic() > t_end:
                    raise TimeoutError(f"jupyter lab did not start in {timeout_s} s:\n{log.read_text()[-3000:]}")
                time.sleep(0.3)
        yield server
    finally:
        proc.terminate()
        try:
            proc.wait(15)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait(5)
        fh.close()


def non_blank_fraction(png: bytes) -> tuple[float, int]:
    """Fraction of pixels that differ from the most common colour, and the
    number of distinct colours, of a PNG screenshot."""
    from PIL import Image

    img = np.asarray(Image.open(io.BytesIO(png)).convert("RGB")).reshape(-1, 3)
    colours, counts = np.unique(img, axis=0, return_counts=True)
    background = colours[np.argmax(counts)]
    differs = np.any(np.abs(img.astype(int) - background.astype(int)) > 12, axis=1)
    return float(differs.mean()), int(len(colours))


#: page check: every visible label, button, tab title and readout of the clusterlab panels whose text is
#: wider than its box (the browser cuts it with "…"); returns [{"text", "scroll", "client"}]
TRUNCATED_JS = """() => {
  const sel = ['.widget-label', '.widget-label-basic', 'button', '.lm-TabBar-tabLabel', '.p-TabBar-tabLabel',
               '.widget-readout', '.widget-description', 'select', 'label'].join(',');
  const out = [];
  let checked = 0;
  for (const panel of document.querySelectorAll('.clusterlab-panel')) {
    for (const el of panel.querySelectorAll(sel)) {
      if (!el.offsetParent || el.clientWidth === 0) continue;   // hidden (another tab, display:none)
      checked += 1;
      if (el.scrollWidth > el.clientWidth + 1)
        out.push({text: (el.innerText || el.textContent || el.value || '').trim().slice(0, 80),
                  scroll: el.scrollWidth, client: el.clientWidth});
    }
  }
  return {checked: checked, cut: out};
}"""


def save_doc_png(src: Path, dest: Path, *, max_width: int = 960) -> int:
    """Copy a screenshot for the README: at most ``max_width`` px wide (Lanczos),
    full colour (a palette loses the few pixels of the QM region), optimised PNG;
    returns the file size in bytes."""
    from PIL import Image

    img = Image.open(src).convert("RGB")
    if img.width > max_width:
        img = img.resize((max_width, round(img.height * max_width / img.width)), Image.LANCZOS)
    dest.parent.mkdir(parents=True, exist_ok=True)
    img.save(dest, format="PNG", optimize=True)
    return dest.stat().st_size

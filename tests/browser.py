"""Headless Chromium for the report tests: render a page, collect console lines."""

import shutil
import subprocess
import tempfile
from pathlib import Path


def chromium_path():
    """Return the headless browser's path, or None."""
    return shutil.which("chromium") or shutil.which("chromium-browser")


_CHECK_IMAGES = ("<script>window.addEventListener('load',()=>{let ok=0;for(const i of "
                 "document.images){if(i.complete&&i.naturalWidth>0){ok++}else{console.error("
                 "'image failed: '+i.alt)}}document.body.setAttribute('data-loaded',ok)});"
                 "</script></body>")


def render_in_chromium(page: Path):
    """Run headless Chromium on a copy of ``page`` with an image-load probe appended; return
    (console lines, dumped DOM)."""
    with tempfile.TemporaryDirectory() as profile, tempfile.TemporaryDirectory() as work:
        probe = Path(work) / page.name
        probe.write_text(page.read_text(encoding="utf-8").replace("</body>", _CHECK_IMAGES),
                         encoding="utf-8")
        cmd = [chromium_path(), "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
               "--no-first-run", "--disable-background-networking",
               "--disable-component-update", "--disable-sync", f"--user-data-dir={profile}",
               "--enable-logging=stderr", "--v=0", "--virtual-time-budget=5000", "--dump-dom",
               probe.as_uri()]
        run = subprocess.run(cmd, capture_output=True, text=True, timeout=180)
    console = [ln for ln in run.stderr.splitlines() if ":CONSOLE" in ln]
    return console, run.stdout

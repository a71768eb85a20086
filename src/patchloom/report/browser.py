"""A headless Chromium, for screenshots of a report and for the tests that open one for real.

Optional: nothing else in the report needs a browser. The flags keep the browser off the network
and away from the user's profile (a throw-away profile folder per call).
"""

from __future__ import annotations

import os
import shutil
import subprocess
import tempfile
from collections.abc import Sequence
from pathlib import Path

FLAGS = (
    "--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
    "--disable-component-update", "--disable-sync", "--no-first-run", "--disable-quic",
    "--hide-scrollbars", "--mute-audio",
)


def find_chromium() -> str | None:
    """Path of a Chromium executable, or None."""
    for name in ("chromium", "chromium-browser"):
        found = shutil.which(name)
        if found:
            return found
    return "/usr/bin/chromium" if os.access("/usr/bin/chromium", os.X_OK) else None


def _run(args: Sequence[str], *, browser: str | None, timeout: float) -> subprocess.CompletedProcess:
    exe = browser or find_chromium()
    if exe is None:
        raise FileNotFoundError("no Chromium found (looked for chromium, chromium-browser); on Debian: apt-get install chromium")
    with tempfile.TemporaryDirectory(prefix="patchloom-chromium-") as profile:
        cmd = [exe, *FLAGS, f"--user-data-dir={profile}", *args]
        return subprocess.run(cmd, capture_output=True, text=True, timeout=timeout, check=False,
                              stdin=subprocess.DEVNULL)


def screenshot(page: str | Path, png: str | Path, *, width: int = 1400, height: int = 2400,
               browser: str | None = None, timeout: float = 90) -> Path:
    """Render a local HTML page headless and save a width x height screenshot of its top."""
    png = Path(png).resolve()
    png.parent.mkdir(parents=True, exist_ok=True)
    if png.exists():
        png.unlink()
    proc = _run([f"--screenshot={png}", f"--window-size={width},{height}",
                 "--run-all-compositor-stages-before-draw", "--virtual-time-budget=5000",
                 Path(page).resolve().as_uri()], browser=browser, timeout=timeout)
    if not png.exists():
        raise RuntimeError(f"Chromium wrote no screenshot (exit {proc.returncode}): {proc.stderr[-600:]}")
    return png


def dump_dom(page: str | Path, *, extra: Sequence[str] = (), budget_ms: int = 5000, browser: str | None = None,
             timeout: float = 90) -> str:
    """The page's DOM after it loaded and its scripts ran (serialised HTML)."""
    proc = _run(["--run-all-compositor-stages-before-draw", f"--virtual-time-budget={budget_ms}", *extra,
                 "--dump-dom", Path(page).resolve().as_uri()], browser=browser, timeout=timeout)
    if proc.returncode != 0 and not proc.stdout:
        raise RuntimeError(f"Chromium failed (exit {proc.returncode}): {proc.stderr[-600:]}")
    return proc.stdout

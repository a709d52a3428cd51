#!/usr/bin/env python3
"""Open a wetpath HTML report in headless Chromium: check that it renders and take a screenshot.

Checks: every <img> loaded (complete with a natural width > 0), no script or resource errors,
nothing logged to the console at error level. Writes a full-page screenshot for a person to look at.

Usage::

    python scripts/check_report.py results/<series>/report.html --screenshot report.png

Exit status 0 when the report passes, 1 when it does not, 2 when no Chromium can be found.
Chromium comes from the Debian package ``chromium`` (``apt-get install -y chromium``).
"""

from __future__ import annotations

import argparse
import html
import json
import os
import re
import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

CANDIDATES = ("chromium", "chromium-browser", "chrome", "google-chrome")
FLAGS = ("--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
         "--disable-background-networking", "--disable-component-update", "--disable-sync",
         "--hide-scrollbars", "--mute-audio")

# Injected at the top of <head> of a copy of the report: records errors (script errors and
# resources that fail to load, caught in the capture phase) and console.error calls, then after
# the load event writes its findings into the DOM, which --dump-dom prints.
PROBE = """<script>
(function(){
  var errs = [];
  window.addEventListener('error', function(e){
    var t = e.target || {};
    errs.push(e.message ? String(e.message) : 'failed to load ' + (t.tagName || '?') + ' '
              + String(t.src || t.href || '').slice(0, 80));
  }, true);
  var ce = console.error;
  console.error = function(){
    errs.push('console.error: ' + Array.prototype.join.call(arguments, ' '));
    return ce.apply(console, arguments);
  };
  window.addEventListener('load', function(){
    var imgs = Array.prototype.slice.call(document.images);
    var broken = imgs.filter(function(i){ return !(i.complete && i.naturalWidth > 0); })
                     .map(function(i){ return (i.alt || i.src).slice(0, 80); });
    var pre = document.createElement('pre');
    pre.id = '__wetpath_check__';
    pre.textContent = JSON.stringify({images: imgs.length, broken: broken, errors: errs,
      height: document.documentElement.scrollHeight, title: document.title});
    document.body.appendChild(pre);
  });
})();
</script>"""


def find_chromium() -> str | None:
    """Path of a Chromium executable on PATH, or None."""
    for name in CANDIDATES:
        path = shutil.which(name)
        if path:
            return path
    return None


def ensure_chromium(*, install: bool = True) -> str | None:
    """Find Chromium; if absent and ``install``, try ``apt-get install -y chromium`` (as root)."""
    path = find_chromium()
    if path or not install or not shutil.which("apt-get") or os.geteuid() != 0:
        return path
    env = {**os.environ, "DEBIAN_FRONTEND": "noninteractive"}
    for cmd in (["apt-get", "install", "-y", "-q", "chromium"],
                ["apt-get", "update", "-q"], ["apt-get", "install", "-y", "-q", "chromium"]):
        try:
            subprocess.run(cmd, env=env, capture_output=True, timeout=900, check=False)
        except (OSError, subprocess.TimeoutExpired):
            return None
        path = find_chromium()
        if path:
            return path
    return None


def _run(chromium: str, args: list[str], profile: str, timeout: float):
    cmd = [chromium, *FLAGS, f"--user-data-dir={profile}", "--enable-logging=stderr", "--v=0",
           *args]
    return subprocess.run(cmd, capture_output=True, text=True, timeout=timeout, check=False)


def _console_errors(stderr: str) -> list[str]:
    """Console messages at error level or uncaught exceptions in Chromium's stderr log."""
    out = []
    for line in stderr.splitlines():
        if "CONSOLE" in line and (":ERROR:" in line or "Uncaught" in line):
            out.append(line.strip())
    return out


def check_report(report: str | os.PathLike, *, screenshot: str | os.PathLike | None = None,
                 chromium: str | None = None, width: int = 1280, timeout: float = 120) -> dict:
    """Load ``report`` in headless Chromium and return what was found.

    Returns a dict: ``images`` (count), ``broken`` (images that did not load), ``errors`` (script
    and resource errors, console errors), ``height`` (page height, px), ``title``, ``screenshot``
    (path or None) and ``ok`` (bool).
    """
    report = Path(report).resolve()
    chromium = chromium or find_chromium()
    if chromium is None:
        raise FileNotFoundError("no Chromium executable found (apt-get install -y chromium)")
    text = report.read_text(encoding="utf-8")
    probed, n = re.subn(r"<head>", "<head>" + PROBE, text, count=1, flags=re.IGNORECASE)
    if not n:
        probed = PROBE + text
    # the probed copy sits beside the report so that relative references resolve as they would
    # for the report itself; profiles and nothing else go to a temporary directory
    fd, name = tempfile.mkstemp(prefix=f".{report.stem}-check-", suffix=".html", dir=report.parent)
    copy = Path(name)
    with os.fdopen(fd, "w", encoding="utf-8") as fh:
        fh.write(probed)
    try:
        return _check(chromium, report, copy, screenshot, width, timeout)
    finally:
        copy.unlink(missing_ok=True)


def _check(chromium, report, copy, screenshot, width, timeout) -> dict:
    with tempfile.TemporaryDirectory(prefix="wetpath-check-") as tmp:
        res = _run(chromium, ["--virtual-time-budget=10000", f"--window-size={width},900",
                              "--dump-dom", copy.as_uri()],
                   str(Path(tmp) / "profile-dom"), timeout)
        m = re.search(r'<pre id="__wetpath_check__">(.*?)</pre>', res.stdout, flags=re.DOTALL)
        if not m:
            return {"ok": False, "images": 0, "broken": [], "height": 0, "title": "",
                    "errors": [f"the page did not finish loading (exit {res.returncode}): "
                               + res.stderr.strip()[-300:]], "screenshot": None}
        found = json.loads(html.unescape(m.group(1)))
        found["errors"] = found["errors"] + _console_errors(res.stderr)
        found["screenshot"] = None
        if screenshot is not None:
            shot = Path(screenshot).resolve()
            shot.parent.mkdir(parents=True, exist_ok=True)
            height = max(600, min(int(found["height"]) + 20, 16000))
            res = _run(chromium, [f"--screenshot={shot}", f"--window-size={width},{height}",
                                  "--virtual-time-budget=10000", report.as_uri()],
                       str(Path(tmp) / "profile-shot"), timeout)
            if shot.is_file() and shot.stat().st_size > 0:
                found["screenshot"] = str(shot)
            else:
                found["errors"].append("no screenshot written: " + res.stderr.strip()[-300:])
    found["ok"] = (not found["broken"] and not found["errors"] and found["images"] > 0)
    return found


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("report", help="the report.html to check")
    parser.add_argument("--screenshot", help="write a full-page PNG screenshot here")
    parser.add_argument("--width", type=int, default=1280, help="window width in px")
    parser.add_argument("--install", action="store_true",
                        help="apt-get install chromium if it is missing (needs root)")
    args = parser.parse_args(argv)
    chromium = ensure_chromium(install=args.install)
    if chromium is None:
        print("check_report: no Chromium found (apt-get install -y chromium)", file=sys.stderr)
        return 2
    found = check_report(args.report, screenshot=args.screenshot, chromium=chromium,
                         width=args.width)
    print(json.dumps(found, indent=2))
    return 0 if found["ok"] else 1


if __name__ == "__main__":
    sys.exit(main())

"""Regenerate the screenshots in this folder from an audit of the bundled demo sample.

Usage (from the repository root): .venv/bin/python docs/screenshots/make_screenshots.py [OUT_DIR]
OUT_DIR is an audit output folder (default: audit the sample into a temporary folder).
Needs headless Chromium (Debian: apt-get install -y chromium) for the report page.
"""
from __future__ import annotations

import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parents[1]

from clearaudit import viewer  # noqa: E402
from clearaudit.report.html import build_report  # noqa: E402

SAMPLE = ROOT / "sample_clouds" / "tarnwick_velloran_230kv"


def main() -> None:
    with tempfile.TemporaryDirectory() as tmp:
        if len(sys.argv) > 1:
            out = Path(sys.argv[1])
        else:
            out = Path(tmp) / "sample"
            subprocess.run([sys.executable, "-m", "clearaudit.cli", "audit",
                            f"{SAMPLE}.laz", "--line", f"{SAMPLE}.line.toml", "--out", str(out)],
                           check=True, capture_output=True, timeout=900)
        viewer.screenshot(out, HERE / "viewer.png", window_size=(1400, 850))
        report = build_report(out)
        # The page below the title: hide the long run details so summary, plan and the first
        # span profile fit in one image (a copy for the screenshot; the report is unchanged).
        page = Path(tmp) / "page.html"
        page.write_text(report.read_text(encoding="utf-8").replace(
            "</style>", "#run, nav {display:none}</style>"), encoding="utf-8")
        chromium = shutil.which("chromium") or shutil.which("chromium-browser")
        if chromium is None:
            raise SystemExit("chromium not found: apt-get install -y chromium")
        subprocess.run(
            [chromium, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
             "--no-first-run", "--disable-background-networking", "--disable-component-update",
             "--disable-sync", f"--user-data-dir={Path(tmp) / 'profile'}", "--hide-scrollbars",
             "--window-size=1100,2300", f"--screenshot={HERE / 'report.png'}", page.as_uri()],
            check=True, capture_output=True, timeout=180)


if __name__ == "__main__":
    main()

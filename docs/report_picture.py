"""Make docs/report.png, the README's picture of a report: the demo's nights through `nightly`, then the
first screen of the latest report.html in headless Chromium (Debian's /usr/bin/chromium via playwright).

    python docs/report_picture.py [OUT.png]

The data are the invented demo scenario; nothing outside this repository is read.
"""

from __future__ import annotations

import shutil
import sys
import tempfile
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(REPO))

from pipeline import nightly  # noqa: E402
from pipeline.config import load_config  # noqa: E402
from pipeline.demo import generate  # noqa: E402


def main(out: Path) -> Path:
    from playwright.sync_api import sync_playwright

    exe = shutil.which("chromium") or "/usr/bin/chromium"
    with tempfile.TemporaryDirectory() as tmp:
        scenario = generate(Path(tmp) / "demo")
        cfg = load_config(REPO / "configs" / "demo.yaml", [
            f"nightly.inbox={scenario.inbox}", f"output.root={Path(tmp) / 'runs'}", "nightly.settle_seconds=0",
            f"report.truth_file={scenario.truth_path}", "output.png=false",
        ])
        if nightly.run(cfg, log=lambda line: None).exit_code != 0:
            raise SystemExit("the demo's nightly run failed")
        page_path = Path(tmp) / "runs" / "latest" / "report.html"
        with sync_playwright() as pw:
            browser = pw.chromium.launch(executable_path=exe, headless=True, args=["--no-sandbox", "--disable-gpu"])
            page = browser.new_page(viewport={"width": 1200, "height": 1400}, device_scale_factor=1)
            page.goto(page_path.resolve().as_uri())
            page.screenshot(path=str(out), full_page=False)
            browser.close()
    return out


if __name__ == "__main__":
    print(main(Path(sys.argv[1]) if len(sys.argv) > 1 else REPO / "docs" / "report.png"))

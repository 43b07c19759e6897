"""Regenerate docs/report.png, the README's picture of a report.

Checks the threshold-geometry demo scenario (the invented seed-pod launcher,
with its relaxation fits) in a scratch folder, opens the report in Debian's
Chromium and photographs its top: title, contents line and the diagnosis.

    .venv/bin/python scripts/screenshot.py                 # writes docs/report.png
    .venv/bin/python scripts/screenshot.py --keep /tmp/demo --draws 500

Needs ``/usr/bin/chromium`` (``apt-get install chromium chromium-driver``);
no browser is downloaded.
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
CHROMIUM = Path("/usr/bin/chromium")
# Headless, no sandbox (root in a container), no background traffic of the browser's own.
CHROMIUM_ARGS = ["--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
                 "--disable-background-networking", "--disable-component-update", "--disable-sync"]
# A laptop screen: the first screen holds the result line and the diagnosis.
VIEWPORT = {"width": 1280, "height": 800}


def demo_run(folder: Path, draws: int, seed: int) -> Path:
    """Check the demo scenario into ``folder``; returns the report's path."""
    from workbench import api, registry
    from workbench.demo import DEMO_SEED
    from workbench.engine import Settings

    recipe = registry.load().get("threshold-geometry")
    scenario = recipe.demo(np.random.default_rng([DEMO_SEED, seed]))
    folder.mkdir(parents=True, exist_ok=True)
    os.chdir(folder)  # the report then names the table as a reader's own run would: demo-data.csv
    scenario.table.to_csv("demo-data.csv", index=False)
    result = api.check("threshold-geometry", "demo-data.csv", options=scenario.options, seed=seed,
                       out="run", force=True, settings=Settings(draws=draws, tune=draws),
                       history=False, say=lambda m: print(f"· {m}", file=sys.stderr))
    return Path(result.files["report"]).resolve()


def photograph(report: Path, png: Path) -> None:
    """The report's header and diagnosis as a PNG, network closed."""
    from playwright.sync_api import sync_playwright

    with sync_playwright() as p:
        browser = p.chromium.launch(executable_path=str(CHROMIUM), args=CHROMIUM_ARGS)
        page = browser.new_page(viewport=VIEWPORT)
        page.route("**/*", lambda r: r.continue_() if r.request.url.startswith(("file:", "data:"))
                   else r.abort())
        page.goto(report.resolve().as_uri())
        bottom = page.eval_on_selector("#diagnosis", "e => e.getBoundingClientRect().bottom")
        png.parent.mkdir(parents=True, exist_ok=True)
        page.screenshot(path=str(png), clip={"x": 0, "y": 0, "width": VIEWPORT["width"],
                                             "height": bottom + 16}, full_page=True)
        browser.close()


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--out", default=str(ROOT / "docs" / "report.png"), help="PNG to write")
    parser.add_argument("--draws", type=int, default=1000, help="draws and warm-up per chain")
    parser.add_argument("--seed", type=int, default=1, help="seed of the demo check")
    parser.add_argument("--keep", default=None, help="folder for the demo run (default: a scratch folder)")
    args = parser.parse_args(argv)
    if not CHROMIUM.exists():
        print(f"screenshot: {CHROMIUM} not found; install Debian's chromium", file=sys.stderr)
        return 2
    out = Path(args.out).resolve()
    with tempfile.TemporaryDirectory(prefix="workbench-screenshot-") as scratch:
        report = demo_run(Path(args.keep or scratch).resolve(), args.draws, args.seed)
        photograph(report, out)
    print(f"wrote {out}")
    return 0


if __name__ == "__main__":
    sys.exit(main())

"""Regenerate ``docs/digest.png``, the README's picture of the demo's digest.

    .venv/bin/python -P docs/make_digest_png.py        # needs headless Chromium (Debian: chromium)

It builds the demo warehouse in a temporary folder, runs the demo's cycle, writes the
digest's HTML with ``expwatch digest --out`` and photographs the top of it in headless
Chromium. The PNG carries a fingerprint of what the demo found (a text chunk,
``expwatch-demo-findings``); ``tests/test_demo_findings.py`` recomputes it from the
demo cycle and fails when the picture no longer shows the current demo, so it cannot
go stale silently: run this script and commit the new picture.
"""

from __future__ import annotations

import hashlib
import shutil
import subprocess
import sys
import tempfile
from pathlib import Path
from typing import Any

FINGERPRINT_KEY = "expwatch-demo-findings"
PNG = Path(__file__).resolve().parent / "digest.png"
WIDTH, HEIGHT = 900, 1500


def fingerprint(result: Any) -> str:
    """A hash of what the digest shows: the live experiments and every finding that is not clear
    (experiment, check, scope, status and its one-sentence summary)."""
    lines = sorted(e.id for e in result.experiments)
    lines += sorted(f"{f.experiment}|{f.check}|{f.scope}|{f.status}|{f.summary}"
                    for f in result.findings if f.status != "ok")
    return hashlib.sha256("\n".join(lines).encode("utf-8")).hexdigest()


def recorded_fingerprint(png: Path = PNG) -> str | None:
    from PIL import Image

    with Image.open(png) as im:
        return im.text.get(FINGERPRINT_KEY)


def main() -> int:
    from PIL import Image
    from PIL.PngImagePlugin import PngInfo

    from monitor.cli import main as expwatch
    from monitor.config import load_config
    from monitor.cycle import run_cycle
    from monitor.demo import DEMO_AS_OF, build_demo_warehouse
    from monitor.demo_config import write_demo_config

    chromium = shutil.which("chromium") or shutil.which("chromium-browser")
    if chromium is None:
        print("make_digest_png: headless Chromium is needed (Debian package 'chromium')", file=sys.stderr)
        return 2
    with tempfile.TemporaryDirectory() as tmp:
        d = Path(tmp)
        build_demo_warehouse(d / "warehouse.duckdb")
        config = write_demo_config(d)
        result = run_cycle(load_config(config), as_of=DEMO_AS_OF)
        page = d / "digest.html"
        code = expwatch(["digest", "--config", str(config), "--out", str(page)])
        if code != 0:
            return code
        shot = d / "shot.png"
        subprocess.run([chromium, "--headless", "--no-sandbox", "--disable-gpu", "--hide-scrollbars",
                        "--disable-background-networking", "--disable-component-update", "--disable-sync",
                        "--no-first-run", f"--user-data-dir={d / 'profile'}", f"--window-size={WIDTH},{HEIGHT}",
                        f"--screenshot={shot}", page.as_uri()], check=True, capture_output=True, timeout=180)
        info = PngInfo()
        info.add_text(FINGERPRINT_KEY, fingerprint(result))
        with Image.open(shot) as im:
            im.convert("RGB").save(PNG, pnginfo=info, optimize=True)
    print(f"wrote {PNG} ({WIDTH}x{HEIGHT})")
    return 0


if __name__ == "__main__":
    sys.exit(main())

"""Rebuild docs/deck-slide.png and docs/brief.png from the invented demo roster.

Run from the project root: ``python docs/make_previews.py``. Needs Chromium (chart export), poppler's
``pdftoppm`` and, for the slide picture only, LibreOffice (``soffice``) to turn the deck into a PDF; those
two tools serve this script alone and are not project dependencies.
"""

from __future__ import annotations

import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from app.analysis.inputs import load_input  # noqa: E402
from app.analysis.jobs import run_bootstrap_now  # noqa: E402
from app.briefing.exports import brief_file, deck_file  # noqa: E402
from app.demo import load_demo  # noqa: E402
from app.store import Store  # noqa: E402

SLIDE = 3  # title, coverage, trend, ...: the trend slide


def main() -> int:
    for tool in ("pdftoppm", "soffice"):
        if shutil.which(tool) is None:
            print(f"{tool} is needed (apt-get install poppler-utils libreoffice-impress)", file=sys.stderr)
            return 1
    with tempfile.TemporaryDirectory() as tmp:
        work = Path(tmp)
        store = Store(f"sqlite:///{work / 'demo.db'}")
        roster = load_demo(store)
        inp = load_input(store, roster.id)
        run_bootstrap_now(store, inp, unit="firm", resamples=2000, seed=20261201)
        # an invented analyst signs the previews, as the Briefing page would save it
        store.save_briefing_settings(roster.id, title="Are forced departures becoming more common?",
                                     author="A. Analyst", marking="CONFIDENTIAL", date="2026-12-03", takeaways={})
        (work / "brief.pdf").write_bytes(brief_file(store, inp))
        (work / "deck.pptx").write_bytes(deck_file(store, inp))
        subprocess.run(["pdftoppm", "-png", "-r", "80", "-singlefile", str(work / "brief.pdf"),
                        str(ROOT / "docs" / "brief")], check=True)
        subprocess.run(["soffice", "--headless", "--convert-to", "pdf", "--outdir", str(work),
                        str(work / "deck.pptx")], check=True, capture_output=True)
        subprocess.run(["pdftoppm", "-png", "-r", "110", "-singlefile", "-f", str(SLIDE), "-l", str(SLIDE),
                        str(work / "deck.pdf"), str(ROOT / "docs" / "deck-slide")], check=True)
        store.dispose()
    print("wrote docs/brief.png and docs/deck-slide.png")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())

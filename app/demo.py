"""Loading the invented demo roster and its two analyst mappings into a store."""

from __future__ import annotations

from pathlib import Path

from app.analysis.mapping_files import import_mapping_file
from app.intake.ingest import import_roster, same_file_roster
from app.store import Roster, Store

DEMO_DIR = Path(__file__).resolve().parents[1] / "demo_data"
DEMO_ROSTER = DEMO_DIR / "roster.csv"
#: mapping name -> CSV; the first is the roster's default, the second a stricter reading of "forced"
DEMO_MAPPINGS = {"demo standard": DEMO_DIR / "mapping-standard.csv",
                 "demo strict": DEMO_DIR / "mapping-strict.csv"}
DEMO_NAME = "Demo index (invented)"


def load_demo(store: Store) -> Roster:
    """Import the demo roster (once) and its mappings; the standard mapping becomes the default."""
    data = DEMO_ROSTER.read_bytes()
    existing = same_file_roster(store, data)
    if existing is not None:
        return existing
    report = import_roster(store, data, DEMO_ROSTER.name, name=DEMO_NAME)
    known = {name for name, _ in store.list_mappings()}
    for name, path in reversed(list(DEMO_MAPPINGS.items())):
        if name not in known:
            import_mapping_file(store, path.read_bytes(), roster=report.roster.id, name=name,
                                author="demo loader")
    store.update_settings(report.roster.id, mapping_name=next(iter(DEMO_MAPPINGS)))
    return store.get_roster(report.roster.id)

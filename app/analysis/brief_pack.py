"""The brief pack: one zip holding the replication pack of every run a brief or deck quotes.

Each quoted run's pack (``build_pack``) is unpacked into its own folder ``run-<id>/`` (ready for
``python reproduce.py`` there); ``manifest.json`` lists each finding, the folders of its runs, the sha256 of
each run's own pack zip (the same bytes ``helmshift run export`` writes, and the hash the brief's footer
names) and of every file in the folder. A run whose kind has no replication pack yet gets a folder with its
stored parameters and results only, and the manifest says why. ``results.json`` holds every finding's numbers.

Like a run's pack, the zip is built byte for byte the same way each time (sorted JSON, fixed member order
and timestamps), so its sha256 names it and the brief's footer can quote it before the brief is drawn.
"""

from __future__ import annotations

import hashlib
import io
import json
import math
import zipfile
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from app import __version__
from app.analysis.replication import ZIP_TIME, build_pack
from app.store import Store, StoreError


@dataclass(frozen=True)
class PackedFinding:
    """What the brief pack needs of one finding: its name, words, runs and own numbers."""

    name: str
    title: str
    takeaway: str
    run_ids: tuple[int, ...] = ()
    numbers: dict[str, Any] = field(default_factory=dict)


@dataclass(frozen=True)
class BriefPack:
    data: bytes
    manifest: dict[str, Any]
    #: (run id, sha256 of its own replication pack) for every run whose pack is inside
    run_packs: tuple[tuple[int, str], ...]

    @property
    def sha256(self) -> str:
        return hashlib.sha256(self.data).hexdigest()


def plain(value: Any) -> Any:
    """JSON-ready: numpy scalars to Python, tuples to lists, non-finite floats to null (never "NaN")."""
    if isinstance(value, dict):
        return {str(k): plain(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [plain(v) for v in value]
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return value


def _json(value: Any) -> str:
    return json.dumps(plain(value), indent=1, sort_keys=True, ensure_ascii=False) + "\n"


def _sha(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def _run_folder(store: Store, run_id: int) -> tuple[dict[str, bytes], dict[str, Any], str | None]:
    """The folder's files, its manifest entry, and the run pack's sha256 (None when no pack exists yet)."""
    folder = f"run-{run_id}/"
    try:
        pack = build_pack(store, run_id)
    except (ValueError, StoreError) as exc:
        # kinds build_pack does not cover yet (e.g. the adjusted trend, rates): the stored numbers only
        run = store.get_run(run_id)
        model = run.params.get("model")
        why = (f"this version builds no replication pack for {'rate' if model == 'rate' else 'adjusted'} runs "
               "(their counts are not the share trend's cells); the stored parameters and results are here"
               if model in ("rate", "adjusted") else str(exc))
        files = {
            f"{folder}params.json": _json({"run": run.id, "kind": run.kind, "params": run.params,
                                           "roster_id": run.roster_id, "roster_version": run.roster_version,
                                           "mapping": [run.mapping_name, run.mapping_version],
                                           "window": run.window, "fingerprint": run.fingerprint}).encode(),
            f"{folder}results.json": _json(run.result or {}).encode(),
        }
        entry = {"run": run_id, "folder": folder, "pack_sha256": None, "pack_refused": why,
                 "files": {name.removeprefix(folder): _sha(data) for name, data in files.items()}}
        return files, entry, None
    files = {}
    with zipfile.ZipFile(io.BytesIO(pack.data)) as archive:
        for name in pack.files:
            files[f"{folder}{name}"] = archive.read(name)
    entry = {"run": run_id, "folder": folder, "pack_sha256": pack.sha256,
             "files": {name.removeprefix(folder): _sha(data) for name, data in files.items()}}
    return files, entry, pack.sha256


def _readme(heading: str, manifest: dict[str, Any]) -> str:
    lines = [
        f"Brief pack: {heading}",
        f"Made with Helmshift {__version__}. Every run the brief or deck quotes, with what an outside",
        "statistician needs to recompute it without Helmshift.",
        "",
        "manifest.json  each finding -> the folders of its runs, the sha256 of each run's own replication",
        "               pack (as `helmshift run export RUN_ID` writes it) and of every file in the folder",
        "results.json   every finding's numbers as the brief and deck show them, and each run's stored results",
        "run-<id>/      one run's replication pack, unpacked: see its README.txt; run `python reproduce.py`",
        "               there (needs only numpy, pandas, scipy and statsmodels)",
        "",
        "Findings:",
    ]
    for f in manifest["findings"]:
        runs = ", ".join(r["folder"] for r in f["runs"]) or "no stored run (its numbers are in results.json)"
        lines.append(f"  {f['finding']}: {runs}")
    refused = [r for f in manifest["findings"] for r in f["runs"] if r["pack_sha256"] is None]
    if refused:
        lines += ["", "Runs without a full replication pack yet (their stored parameters and results are in the",
                  "folder):"]
        lines += [f"  {r['folder']}: {r['pack_refused']}" for r in refused]
    lines += ["", "Rosters hold personal data about named people; no departure records are in this pack."]
    return "\r\n".join(lines) + "\r\n"


def build_brief_pack(store: Store, findings: Sequence[PackedFinding], *, heading: str) -> BriefPack:
    """The zip of every quoted run's replication pack, with manifest.json, results.json and README.txt."""
    if not findings:
        raise ValueError("A brief pack needs at least one finding.")
    members: dict[str, bytes] = {}
    entries: dict[int, dict[str, Any]] = {}
    packs: dict[int, str] = {}
    for finding in findings:
        for run_id in finding.run_ids:
            if run_id in entries:
                continue
            files, entry, sha = _run_folder(store, run_id)
            members.update(files)
            entries[run_id] = entry
            if sha is not None:
                packs[run_id] = sha
    manifest = {"heading": heading, "tool_version": __version__, "findings": [
        {"finding": f.name, "title": f.title, "runs": [entries[i] for i in dict.fromkeys(f.run_ids)]}
        for f in findings]}
    results = {"findings": [
        {"finding": f.name, "title": f.title, "takeaway": f.takeaway, "numbers": f.numbers,
         "runs": {str(i): (store.get_run(i).result or {}) for i in dict.fromkeys(f.run_ids)}}
        for f in findings]}
    top = {"README.txt": _readme(heading, manifest).encode(), "manifest.json": _json(manifest).encode(),
           "results.json": _json(results).encode()}
    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w") as archive:
        for name, data in {**top, **members}.items():
            info = zipfile.ZipInfo(name, date_time=ZIP_TIME)
            info.compress_type = zipfile.ZIP_DEFLATED
            info.external_attr = 0o644 << 16
            archive.writestr(info, data)
    return BriefPack(buffer.getvalue(), manifest, tuple(packs.items()))

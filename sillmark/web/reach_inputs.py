"""A site's river profile, refuges and roads: where their GeoJSON files are kept,
what a run's settings record of them, and what the worker hands to
:func:`sillmark.run.analyse`.

Each upload is stored under a new name in the site's ``reach/`` folder and
``reach/current.json`` names the files in use, so a run keeps reading the files
its settings snapshot names even after the user replaces them.
"""

from __future__ import annotations

import json
import os
from pathlib import Path

from sillmark.web import layout

#: The inputs, as ``run.analyse`` names them, and as pages name them.
KINDS = {"profile": "river profile", "refuges": "refuges", "roads": "roads"}
FOLDER = "reach"
_CURRENT = "current.json"


def stored(site_folder: Path) -> dict[str, dict]:
    """The files in use: ``{kind: {"file": path inside the site folder, "name": original name}}``."""
    path = Path(site_folder) / FOLDER / _CURRENT
    if not path.is_file():
        return {}
    found = json.loads(path.read_text(encoding="utf-8"))
    return {k: v for k, v in found.items() if k in KINDS and (Path(site_folder) / v["file"]).is_file()}


def store(site_folder: Path, files: dict[str, dict]) -> None:
    """Record ``files`` (as :func:`stored` gives them) as the ones in use, atomically."""
    folder = Path(site_folder) / FOLDER
    folder.mkdir(parents=True, exist_ok=True)
    tmp = folder / (layout.new_name(".json") + ".part")
    tmp.write_text(json.dumps(files, sort_keys=True), encoding="utf-8")
    os.replace(tmp, folder / _CURRENT)


def new_file() -> str:
    """A fresh name for an uploaded file, inside the site folder."""
    return f"{FOLDER}/{layout.new_name('.geojson')}"


def run_settings(site_folder: Path) -> dict:
    """What a run's settings snapshot records: ``{"reach": {...}}``, or nothing."""
    files = stored(site_folder)
    return {"reach": files} if files else {}


def analyse_inputs(site_folder: Path, settings: dict) -> dict:
    """Keyword arguments of :func:`sillmark.run.analyse` for the run's settings."""
    return {kind: Path(site_folder) / entry["file"]
            for kind, entry in (settings.get("reach") or {}).items() if kind in KINDS}


def names(data_dir: Path, site_id: int) -> dict[str, str]:
    """``{kind: original file name}`` of the files a site uses, for its settings page."""
    return {k: v["name"] for k, v in stored(layout.site_dir(Path(data_dir), site_id)).items()}

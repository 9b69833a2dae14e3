"""The folder a pack is written to (`export --out DIR`).

A pack is written only into a folder that is new, empty, or holds an earlier cuewatch
pack and nothing else: the earlier pack's files (those its ``manifest.json`` lists, and
the manifest) are replaced as a whole, so no file of another quarter or as-of time is
left beside the new manifest.  A folder holding anything else is refused (exit 2): its
files are not ours to delete.

The new files are written into a staging folder inside ``DIR`` first and moved into
place only when all of them exist, the manifest last; an export that fails before that
leaves the earlier pack as it was (and the staging folder, which the next export
removes).
"""

from __future__ import annotations

import json
import os
import shutil
from pathlib import Path

from monitor.errors import UserError

MANIFEST = "manifest.json"
STAGING = ".cuewatch-export-in-progress"


class PackFolderError(UserError):
    """The --out folder cannot take a pack (one sentence; the CLI exits 2)."""


def _listed(manifest: Path) -> set[str] | None:
    """The file names an earlier pack's manifest lists, or None when ``manifest`` is not
    a cuewatch manifest.  A name with a folder part is not ours: None."""
    try:
        doc = json.loads(manifest.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    if not isinstance(doc, dict) or (doc.get("software") or {}).get("name") != "cuewatch":
        return None
    names = {doc.get("methodology"), doc.get("workbook"), doc.get("report")}
    for entry in (doc.get("tables") or {}).values():
        names.update(f.get("path") for f in (entry.get("files") or {}).values())
    names.discard(None)
    if any(not isinstance(n, str) or Path(n).name != n or n in ("", ".", "..") for n in names):
        return None
    return names | {MANIFEST}


def _some(names: list[str]) -> str:
    shown = ", ".join(names[:3])
    return shown + (f" and {len(names) - 3} more" if len(names) > 3 else "")


def earlier_pack(out_dir: Path) -> list[Path]:
    """The files of the earlier pack in ``out_dir`` that a new pack replaces ([] when the
    folder is new or empty).  Raises PackFolderError when ``out_dir`` is a file, or holds
    anything but one earlier cuewatch pack (and a staging folder an interrupted export
    left)."""
    if not out_dir.exists():
        return []
    if not out_dir.is_dir():
        raise PackFolderError(f"--out {out_dir} is a file, not a folder.")
    present = sorted(p.name for p in out_dir.iterdir() if p.name != STAGING)
    if not present:
        return []
    listed = _listed(out_dir / MANIFEST)
    if listed is None:
        raise PackFolderError(
            f"--out {out_dir} holds files that are not a cuewatch audit pack "
            f"({_some(present)}): give a new or empty folder, or the folder of an earlier pack."
        )
    others = [n for n in present if n not in listed or not (out_dir / n).is_file()]
    if others:
        raise PackFolderError(
            f"--out {out_dir} holds an earlier audit pack and also {_some(others)}, which "
            "are not part of it: move them, or give a new or empty folder."
        )
    return [out_dir / n for n in present]


def staging_folder(out_dir: Path) -> Path:
    """A fresh, empty staging folder inside ``out_dir`` (created with its parents)."""
    out_dir.mkdir(parents=True, exist_ok=True)
    stage = out_dir / STAGING
    if stage.exists():
        shutil.rmtree(stage)  # left by an interrupted export: only our files are in it
    stage.mkdir()
    return stage


def publish(stage: Path, files: list[Path], out_dir: Path) -> list[Path]:
    """Replace the earlier pack in ``out_dir`` with ``files`` (all inside ``stage``):
    delete the earlier pack's files, move the new ones in (``manifest.json`` last),
    remove ``stage``.  Returns the files' final paths, in the order given."""
    for old in earlier_pack(out_dir):
        old.unlink()
    ordered = sorted(files, key=lambda p: p.name == MANIFEST)
    for path in ordered:
        os.replace(path, out_dir / path.name)
    stage.rmdir()
    return [out_dir / p.name for p in files]

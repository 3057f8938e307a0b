"""Generated files that clean up after themselves and never overwrite a person's edit.

An export (or a render) records what it wrote in a manifest in its output directory: each file's path and the
SHA-256 of its content. On the next run:

* a file it wrote before that no longer belongs (the rules of a stage that was removed or renamed) is removed,
  and listed;
* a file whose content changed since it was written was edited by a person: the command stops and names it,
  unless ``--force``, which keeps the person's version as ``FILE.bak`` beside the new one; a file that is there but
  was never written by this command (a hand-written ``plan.md``) counts as edited;
* every target is checked before the first byte is written, so a bad target (a directory where a file goes)
  writes nothing; the manifest is written last.
"""

from __future__ import annotations

import hashlib
import json
import os
from dataclasses import dataclass, field
from pathlib import Path
from typing import Iterable

from stagewatch.errors import StagewatchError
from stagewatch.safewrite import resolve_target, safe_write, safe_write_all

MANIFESTS = {"export": ".stagewatch-export.json", "render-markdown": ".stagewatch-render-markdown.json",
             "render-html": ".stagewatch-render-html.json"}
SHOWN = 8  # names shown in a message before "and N more"


@dataclass
class Outcome:
    written: list[str] = field(default_factory=list)
    removed: list[str] = field(default_factory=list)
    kept_edited: list[str] = field(default_factory=list)  # stale files a person edited: left in place
    backups: list[str] = field(default_factory=list)

    def lines(self, directory: str) -> list[str]:
        out = []
        if self.removed:
            out.append(f"removed from {directory}, no longer part of the plan: {_names(self.removed)}")
        if self.kept_edited:
            out.append(f"kept in {directory}, edited by hand although no longer part of the plan (delete them when "
                       f"done): {_names(self.kept_edited)}")
        if self.backups:
            out.append(f"kept the hand-edited versions as .bak: {_names(self.backups)}")
        return out


def _names(items: list[str]) -> str:
    shown = ", ".join(items[:SHOWN])
    return shown + (f" and {len(items) - SHOWN} more" if len(items) > SHOWN else "")


def _digest(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def _on_disk(path: Path) -> str | None:
    try:
        return _digest(path.read_bytes())
    except (FileNotFoundError, IsADirectoryError, NotADirectoryError):
        return None
    except OSError as exc:
        raise StagewatchError(f"cannot read this file: {exc.strerror}", file=str(path)) from None


def read_manifest(path: Path) -> dict[str, str]:
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        return {}
    except (OSError, ValueError):
        raise StagewatchError("this record of the files stagewatch wrote here cannot be read", file=str(path),
                              expected="the JSON file a previous run wrote; delete it to start the record afresh "
                                       "(files not in it then count as written by hand)") from None
    files = data.get("files") if isinstance(data, dict) else None
    if not isinstance(files, dict) or not all(isinstance(k, str) and isinstance(v, str) for k, v in files.items()):
        raise StagewatchError("this record of the files stagewatch wrote here has an unexpected form",
                              file=str(path), expected='{"files": {"path": "sha256", ...}}')
    return files


def _inside(directory: Path, rel: str) -> Path | None:
    """The manifest's relative path under ``directory``, or None if it would lead outside it."""
    candidate = (directory / rel)
    if ".." in Path(rel).parts or Path(rel).is_absolute():
        return None
    return candidate


def write_owned(directory: str | Path, files: dict[Path, str], *, kind: str,
                inputs: Iterable[str | os.PathLike[str]] = (), force: bool = False) -> Outcome:
    """Write ``files`` (all under ``directory``) as the owner of that directory's generated files."""
    root = Path(directory)
    manifest = root / MANIFESTS[kind]
    sources = list(inputs)
    for path in [*files, manifest]:
        resolve_target(path, sources)  # every target checked before anything is written
    previous = read_manifest(manifest)
    new = {str(path.relative_to(root)): _digest(text.encode("utf-8")) for path, text in files.items()}
    edited = []
    for path in files:
        rel = str(path.relative_to(root))
        disk = _on_disk(path)
        if disk is not None and disk != new[rel] and disk != previous.get(rel):
            edited.append(rel)
    if edited and not force:
        raise StagewatchError(
            f"{len(edited)} file(s) here changed since stagewatch wrote them, or were not written by it: "
            f"{_names(edited)}; nothing was written, so no edit is lost", file=str(root),
            expected="move the changes into the plan and delete the files, or run again with --force (which keeps "
                     "each edited file as FILE.bak)")
    outcome = Outcome()
    for rel in edited:  # --force: the person's version stays beside the new one
        backup = root / f"{rel}.bak"
        safe_write(backup, (root / rel).read_text(encoding="utf-8", errors="replace"), inputs=sources)
        outcome.backups.append(f"{rel}.bak")
    safe_write_all(files, inputs=sources)
    outcome.written = sorted(new)
    for rel, digest in sorted(previous.items()):
        if rel in new:
            continue
        stale = _inside(root, rel)
        if stale is None:
            continue
        disk = _on_disk(stale)
        if disk is None:
            continue
        if disk == digest:
            stale.unlink()
            outcome.removed.append(rel)
        else:
            outcome.kept_edited.append(rel)
    record = {"written_by": f"stagewatch {kind}", "files": dict(sorted(new.items()))}
    safe_write(manifest, json.dumps(record, indent=1) + "\n", inputs=sources)
    return outcome

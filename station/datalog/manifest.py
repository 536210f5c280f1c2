"""The datalog manifest: SHA-256 and size of every file, and the check that nothing changed.

manifest.json guards against accidents (a file edited, truncated, lost or slipped in), not
against someone who rewrites the manifest as well. It carries a hash of its own content and
is written in one canonical layout, so a change of any one byte in it is caught too.
"""

from __future__ import annotations

import json
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from station.datalog.folder import (
    CONFIG_COPIES,
    LOT_JSON,
    MANIFEST,
    OPTIONAL_COPIES,
    DatalogError,
    sha256_of,
    sha256_of_text,
    write_atomically,
)

MANIFEST_NAME = MANIFEST
MANIFEST_FORMAT = "ampscreen-manifest/1"
_SELF_HASH = "manifest_sha256"


@dataclass
class VerifyReport:
    """What `verify_datalog` found; `intact` is True when every list is empty."""

    folder: Path
    checked: int = 0
    changed: list[str] = field(default_factory=list)
    missing: list[str] = field(default_factory=list)
    added: list[str] = field(default_factory=list)
    problems: list[str] = field(default_factory=list)  # manifest or lot.json hash problems

    @property
    def intact(self) -> bool:
        return not (self.changed or self.missing or self.added or self.problems)

    def messages(self) -> list[str]:
        """One line per finding, each naming the file."""
        return ([f"changed: {name} (content differs from the manifest)" for name in self.changed]
                + [f"missing: {name} (listed in the manifest)" for name in self.missing]
                + [f"added: {name} (not in the manifest: added after the lot ended)"
                   for name in self.added]
                + list(self.problems))


def _folder_files(folder: Path) -> list[str]:
    """Every file below `folder` except the manifest, as sorted POSIX relative paths."""
    names = [p.relative_to(folder).as_posix() for p in folder.rglob("*") if p.is_file()]
    return sorted(n for n in names if n != MANIFEST_NAME)


def _canonical(content: dict[str, Any]) -> str:
    return json.dumps(content, indent=2, sort_keys=True) + "\n"


def _self_hash(content: dict[str, Any]) -> str:
    body = {k: v for k, v in content.items() if k != _SELF_HASH}
    return sha256_of_text(_canonical(body))


def _write(folder: Path, content: dict[str, Any]) -> Path:
    content = {k: v for k, v in content.items() if k != _SELF_HASH}
    content[_SELF_HASH] = _self_hash(content)
    path = folder / MANIFEST_NAME
    write_atomically(path, _canonical(content))
    return path


def _utc_now() -> tuple[str, float]:
    now = time.time()
    return time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime(now)), now


def write_manifest(datalog_dir: Path) -> Path:
    """Write manifest.json listing sha256 and size of every other file in the folder."""
    folder = Path(datalog_dir)
    written, written_t = _utc_now()
    files = {name: {"sha256": sha256_of(folder / name), "size": (folder / name).stat().st_size}
             for name in _folder_files(folder)}
    return _write(folder, {"format": MANIFEST_FORMAT, "written": written,
                           "written_t": written_t, "files": files})


def record_file(datalog_dir: Path, name: str, by: str) -> Path:
    """Add (or update) one file's entry in an existing manifest, noting who and when.

    For a file derived later from the folder (e.g. lot.stdf by `station convert`); callers
    check that the folder was intact first, so a damaged folder is never re-signed.
    """
    folder = Path(datalog_dir)
    content = _load_manifest(folder)
    path = folder / name
    entry = {"sha256": sha256_of(path), "size": path.stat().st_size}
    if content["files"].get(name) == entry:
        return folder / MANIFEST_NAME  # already recorded as it is
    content["files"][name] = entry
    when, _ = _utc_now()
    content.setdefault("amended", []).append({"file": name, "by": by, "when": when})
    return _write(folder, content)


class _ManifestDamaged(Exception):
    pass


def _load_manifest(folder: Path) -> dict[str, Any]:
    raw = (folder / MANIFEST_NAME).read_bytes()
    try:
        content = json.loads(raw.decode("utf-8"))
    except (UnicodeDecodeError, json.JSONDecodeError):
        raise _ManifestDamaged(f"{MANIFEST_NAME}: not valid JSON (damaged or edited)") from None
    if not isinstance(content, dict) or not isinstance(content.get("files"), dict):
        raise _ManifestDamaged(f"{MANIFEST_NAME}: has no 'files' table (damaged or edited)")
    if _canonical(content).encode("utf-8") != raw or content.get(_SELF_HASH) != _self_hash(content):
        raise _ManifestDamaged(f"{MANIFEST_NAME}: changed (its own hash or layout does not match)")
    return content


def check_config_copies(folder: Path) -> list[str]:
    """lot.json records the sha256 of each configuration file applied; compare the copies.
    One line per problem (none if lot.json is missing: the manifest check reports that)."""
    try:
        lot = json.loads((folder / LOT_JSON).read_text(encoding="utf-8"))
    except FileNotFoundError:
        return []
    except (UnicodeDecodeError, json.JSONDecodeError):
        return ["lot.json: not valid JSON (damaged or edited)"]
    problems = []
    recorded = [key for key in OPTIONAL_COPIES if isinstance(lot, dict) and key in lot]
    for key in (*CONFIG_COPIES, *recorded):
        entry = lot.get(key) if isinstance(lot, dict) else None
        if not isinstance(entry, dict) or not entry.get("sha256"):
            problems.append(f"lot.json: no recorded sha256 for the {key} file")
            continue
        name = str(entry.get("file") or f"{key}.yaml")
        copy = folder / name
        if not copy.is_file():
            problems.append(f"{name}: copy of the {key} file is missing")
        elif sha256_of(copy) != entry["sha256"]:
            problems.append(f"{name}: sha256 differs from the one lot.json recorded "
                            f"for the {key} file that was applied")
    return problems


def verify_datalog(datalog_dir: Path) -> VerifyReport:
    """Compare the folder with its manifest and lot.json's configuration hashes."""
    folder = Path(datalog_dir)
    has_manifest = (folder / MANIFEST_NAME).is_file()
    if not folder.is_dir() or not (has_manifest or (folder / "lot.json").is_file()):
        raise DatalogError(f"not a datalog folder (no lot.json or {MANIFEST_NAME})", path=folder,
                           hint="give a datalog folder written with --out")
    report = VerifyReport(folder)
    present = set(_folder_files(folder))
    if not has_manifest:
        report.problems.append(f"{MANIFEST_NAME}: missing (the lot has not ended, was stopped during its end, "
                               "or the file was lost; `station verify --seal` seals a lot that ended)")
    else:
        try:
            listed: dict[str, Any] = _load_manifest(folder)["files"]
        except _ManifestDamaged as exc:
            report.problems.append(str(exc))
            listed = {}
        for name in sorted(listed):
            path = folder / name
            if name not in present:
                report.missing.append(name)
                continue
            report.checked += 1
            entry = listed[name]
            if (not isinstance(entry, dict) or path.stat().st_size != entry.get("size")
                    or sha256_of(path) != entry.get("sha256")):
                report.changed.append(name)
        if listed or not report.problems:
            report.added = sorted(present - set(listed))
    report.problems.extend(check_config_copies(folder))
    return report

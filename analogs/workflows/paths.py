"""Where outputs and stores may be: outputs never inside a store, stores never inside
one another, store paths taken as the real directory they name.

A store is a directory the tool owns: every write replaces the whole directory
(:func:`analogs.workflows.store.transaction`), and its manifest lists the files it
wrote. An output file dropped inside it (a tags table, maps, a report, a briefing)
would either overwrite a store file (the store then no longer loads) or be a stranger
the next write has to step around. So every output path is checked here, before any
work, with the real path (symbolic links and ``..`` resolved): a path that is a store,
or lies anywhere below one, is refused with one line naming the option.

This module imports only the standard library and the base layer (it is used while
the command line checks its options).
"""

from __future__ import annotations

import json
import os
from pathlib import Path

from analogs._validation import fail
from analogs.errors import AnalogsInputError

#: The manifest file that marks a store directory.
MANIFEST = "manifest.json"
#: Files a store writes (what a build may replace; anything else is the user's).
STORE_FILES = ("manifest.json", "basis.nc", "scores.nc", "events.parquet", "tags.parquet",
               "models.nc")
#: A manifest larger than this is not read to recognise a store (a store's is a few kB).
_MANIFEST_READ_LIMIT = 16 << 20


def provenance(paths) -> list[dict]:
    """Each input path as the manifest records it: its real absolute path and its size
    in bytes (a folder, such as a Zarr store: the sum of its files)."""
    entries = []
    for path in paths:
        path = Path(path)
        size = path.stat().st_size if path.is_file() else sum(
            f.stat().st_size for f in path.rglob("*") if f.is_file())
        entries.append({"path": str(path.resolve()), "bytes": size})
    return entries


def real_path(path) -> Path:
    """``path`` as the real directory or file it names: absolute, symbolic links and
    ``..`` resolved (the parts that do not exist yet are kept as written)."""
    return Path(os.path.realpath(os.path.expanduser(os.fspath(path))))


def is_store(path) -> bool:
    """Whether ``path`` is a directory holding an analogs store's ``manifest.json``
    (``"format": "analogs-store"``), or a manifest that cannot be read beside a store's
    ``scores.nc`` or ``basis.nc`` (a damaged store is still a store)."""
    path = Path(path)
    manifest = path / MANIFEST
    try:
        if not manifest.is_file():
            return False
        if manifest.stat().st_size <= _MANIFEST_READ_LIMIT:
            data = json.loads(manifest.read_text(encoding="utf-8"))
            if isinstance(data, dict) and data.get("format") == "analogs-store":
                return True
    except (OSError, UnicodeDecodeError, ValueError):
        pass
    return (path / "scores.nc").exists() or (path / "basis.nc").exists()


def enclosing_store(path) -> Path | None:
    """The store that ``path`` is, or lies inside (its real path), else None."""
    current = real_path(path)
    for candidate in (current, *current.parents):
        if is_store(candidate):
            return candidate
    return None


def check_output(path, name: str, owner: str | None, *, kind: str = "file"):
    """Refuse an output ``path`` that is, or lies inside, an analogs store; for
    ``kind="directory"`` also an existing file, for ``kind="file"`` an existing
    directory. ``name`` and ``owner`` name the parameter (or the option, ``owner=None``
    and ``name="--out"``) in the one message shape. Returns ``path`` unchanged."""
    if path is None:
        return None
    store = enclosing_store(path)
    what = "a directory" if kind == "directory" else "a file"
    if store is not None:
        where = "is" if store == real_path(path) else "lies inside"
        fail(name, owner, f"{what} outside any analogs store (it {where} the store {store}; "
             "outputs never go into a store)", str(path))
    target = Path(path)
    if kind == "directory" and target.exists() and not target.is_dir():
        fail(name, owner, f"a directory ({target} is an existing file; give a new or an "
             "existing directory)", str(path))
    if kind == "file" and target.is_dir():
        fail(name, owner, f"a file name ({target} is an existing directory)", str(path))
    return path


def refuse_inside_store(path) -> None:
    """The last guard of every output write (:func:`analogs.workflows.files.atomic_path`):
    refuse a file whose directory is, or lies inside, an analogs store. A store's own
    files are written into its staging directory, a sibling of the store, never inside
    it; so no write of the tool itself is refused here."""
    store = enclosing_store(Path(path).parent)
    if store is not None:
        raise AnalogsInputError(
            f"{path}: lies inside the analogs store {store}; outputs are never written "
            "into a store (give a path outside it)")


def foreign_entries(path, listed=()) -> list[str]:
    """Names in the store directory ``path`` that the store did not write: neither its
    manifest, nor a file ``listed`` (by default: listed in its manifest, when readable),
    nor one of the names a store writes (:data:`STORE_FILES`)."""
    path = Path(path)
    if not listed:
        try:
            listed = json.loads((path / MANIFEST).read_text(encoding="utf-8")).get("files") or ()
        except (OSError, UnicodeDecodeError, ValueError, AttributeError):
            listed = ()
    own = set(STORE_FILES) | set(listed)
    try:
        return sorted(item.name for item in path.iterdir() if item.name not in own)
    except (FileNotFoundError, NotADirectoryError):
        return []

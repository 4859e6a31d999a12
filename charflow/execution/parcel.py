"""The files a sweep's testbenches read, shipped by content to workers on other machines.

A deck names its model files by the driver's paths, and a model file names others
(``.include``, ``.lib``) relative to itself. A cluster worker shares no file system with the
driver, so the driver reads every file the decks read (``pack``: once per process while the
files are unchanged) and the bytes travel with the work. A worker writes them into a folder of
its own, the files' layout below their common folder kept, so relative reads between them still
find each other (``unpack``), and points the deck's reads at those copies (``localize``). The
folder is named by a digest of the names and contents: a file changed between two runs makes
a new folder and a new deck key, never a stale copy in a long-lived worker. The cell's netlist
travels inside the deck (``Deck.text`` holds it rendered).
"""

from __future__ import annotations

import dataclasses
import functools
import hashlib
import json
import os
import shutil
import tempfile
from collections.abc import Callable, Iterable
from dataclasses import dataclass
from pathlib import Path

from charflow.simulation.netlist import Deck, model_files, repoint_reads

PACKS = 8  # parcels kept per process (a run packs the same files for each of its stages)


@dataclass(frozen=True, slots=True)
class Parcel:
    """The files some decks read, by content, and where the driver had them."""

    tree: str  # sha256 of every file's name and content: the name of a worker's copy
    files: tuple[tuple[str, str], ...]  # (path below the files' common folder, sha256)
    origins: tuple[tuple[str, str], ...]  # (the driver's path, path below the common folder)
    base: str  # the driver's folder a deck's relative reads start from (its working folder)
    blobs: dict[str, bytes] = dataclasses.field(hash=False)  # sha256 → the bytes, each once


def pack(decks: Iterable[Deck], base: Path) -> Parcel:
    """Every readable file ``decks`` read, followed through ``.include`` and ``.lib`` (relative
    reads of a deck from ``base``). A file that cannot be read is left out: the worker's
    simulator names it when the deck runs."""
    paths = dict.fromkeys(p for d in decks for p in model_files(d.text, base))
    stamps = []
    for p in paths:
        try:
            stat = p.stat()
        except OSError:
            continue
        stamps.append((str(p), stat.st_mtime_ns, stat.st_size))
    return _pack(tuple(stamps), str(base))


@functools.lru_cache(maxsize=PACKS)
def _pack(stamps: tuple[tuple[str, int, int], ...], base: str) -> Parcel:
    # Keyed by each file's size and modification time, as ``provenance.file_digest`` is.
    contents: dict[Path, bytes] = {}
    for path, _, _ in stamps:
        try:
            contents[Path(path)] = Path(path).read_bytes()
        except OSError:
            continue
    if not contents:
        return Parcel(_digest(b"[]"), (), (), base, {})
    root = Path(os.path.commonpath([p.parent for p in contents]))
    names = {p: p.relative_to(root).as_posix() for p in contents}
    digests = {p: _digest(b) for p, b in contents.items()}
    files = tuple((names[p], digests[p]) for p in contents)
    tree = _digest(json.dumps(files).encode())
    origins = tuple((str(p), names[p]) for p in contents)
    return Parcel(tree, files, origins, base, {digests[p]: b for p, b in contents.items()})


def _digest(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def unpack(parcel: Parcel, folder: Path) -> Path:
    """The folder below ``folder`` holding the parcel's files, written now if it is not there.

    Written under a temporary name and renamed whole, so a process that meets a half-written
    copy of another (two workers on one machine) cannot happen. A read by absolute path inside
    a file is pointed at the copy of the file it names.
    """
    target = folder / parcel.tree
    if target.is_dir():
        return target
    folder.mkdir(parents=True, exist_ok=True)
    partial = Path(tempfile.mkdtemp(prefix=f".{parcel.tree[:16]}-", dir=folder))
    local = _local_paths(parcel, target)
    for name, digest in parcel.files:
        data = parcel.blobs[digest]
        dest = partial / name
        dest.parent.mkdir(parents=True, exist_ok=True)
        # Latin-1 maps every byte to one character and back: the bytes are kept exactly.
        text = data.decode("latin-1")
        moved = repoint_reads(text, _absolute_only(local))
        dest.write_bytes(moved.encode("latin-1") if moved != text else data)
    try:
        partial.rename(target)
    except OSError:  # another process of this machine wrote the same files first
        shutil.rmtree(partial, ignore_errors=True)
    return target


def localize(deck: Deck, parcel: Parcel, target: Path) -> Deck:
    """``deck`` reading the copies in ``target`` (``unpack``) instead of the driver's files; its
    key names the parcel too, so a worker that has loaded the deck with older files reads it
    again."""
    local = _local_paths(parcel, target)

    def to(name: str) -> str | None:
        path = (Path(parcel.base) / name).resolve()
        return str(local[path]) if path in local else None

    text = repoint_reads(deck.text, to)
    key = hashlib.sha256(f"{deck.key}\n{parcel.tree}".encode()).hexdigest()
    return dataclasses.replace(deck, text=text, key=key)


def _local_paths(parcel: Parcel, target: Path) -> dict[Path, Path]:
    return {Path(origin): target / name for origin, name in parcel.origins}


def _absolute_only(local: dict[Path, Path]) -> Callable[[str], str | None]:
    def to(name: str) -> str | None:
        if not Path(name).is_absolute():
            return None  # a relative read finds the copy beside its own
        path = Path(name).resolve()
        return str(local[path]) if path in local else None

    return to

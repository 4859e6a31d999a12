"""The files a deck reads, packed by content and unpacked elsewhere (``execution.parcel``): the
layout below their common folder is kept, reads by absolute path are pointed at the copies, and
a deck pointed at the copies reads nothing of the driver's folders. ngspice reads a relative
``.include`` from the folder of the file that names it (the ngspice manual, ".include")."""

from __future__ import annotations

from pathlib import Path

from charflow.execution import parcel
from charflow.simulation.netlist import Deck, model_files, repoint_reads


def _kit(root: Path) -> Path:
    """A top file reading one file below it, one beside its folder and one by absolute path."""
    (root / "kit" / "cards").mkdir(parents=True)
    (root / "shared").mkdir()
    (root / "kit" / "cards" / "n.inc").write_text(".model nch nmos level=1\n")
    (root / "shared" / "p.inc").write_text(".model pch pmos level=1\n")
    (root / "shared" / "corner.lib").write_text(".lib tt\n.param t=1\n.endl tt\n")
    absolute = root / "shared" / "corner.lib"
    top = root / "kit" / "top.lib"
    top.write_text(
        f'.include "cards/n.inc"\n.inc ../shared/p.inc\n.lib "{absolute}" tt\n'
        "* .include not/a/read.inc\n"
    )
    return top


def _deck(top: Path) -> Deck:
    return Deck("X", f'* a testbench\n.lib "{top}" tt\n.end\n', "k", "vsupply")


def test_the_layout_is_kept_and_absolute_reads_are_pointed_at_the_copies(tmp_path):
    top = _kit(tmp_path / "here")
    files = parcel.pack([_deck(top)], tmp_path)
    assert [n for n, _ in files.files] == [
        "kit/top.lib",
        "kit/cards/n.inc",
        "shared/p.inc",
        "shared/corner.lib",
    ]
    target = parcel.unpack(files, tmp_path / "worker")
    for name in ("kit/cards/n.inc", "shared/p.inc", "shared/corner.lib"):
        assert (target / name).read_bytes() == (tmp_path / "here" / name).read_bytes()
    copied = (target / "kit" / "top.lib").read_text()
    assert str(tmp_path / "here") not in copied
    assert f'.lib "{target / "shared" / "corner.lib"}" tt' in copied
    assert copied.startswith('.include "cards/n.inc"\n.inc ../shared/p.inc\n')  # relative: as is
    # Every file the copies read is a copy.
    moved = parcel.localize(_deck(top), files, target)
    read = model_files(moved.text, tmp_path / "elsewhere")
    assert len(read) == 4 and all(p.is_relative_to(target) and p.exists() for p in read)


def test_a_changed_file_is_a_new_folder_and_a_new_deck_key(tmp_path):
    top = _kit(tmp_path / "here")
    deck = _deck(top)
    first = parcel.pack([deck], tmp_path)
    (tmp_path / "here" / "shared" / "p.inc").write_text(".model pch pmos level=1 vto=-0.4\n")
    second = parcel.pack([deck], tmp_path)
    assert first.tree != second.tree
    keys = {parcel.localize(deck, f, tmp_path / f.tree).key for f in (first, second)}
    assert len(keys) == 2 and deck.key not in keys
    # Unpacking twice reuses the folder.
    target = parcel.unpack(second, tmp_path / "worker")
    assert parcel.unpack(second, tmp_path / "worker") == target


def test_repoint_reads_changes_only_the_file_names_of_reads():
    text = ".include 'a.inc'\n.lib b.lib ff\n.lib ff\n* .include c.inc\n.endl ff\n"
    moved = repoint_reads(text, lambda name: f"/new/{name}")
    assert (
        moved
        == '.include "/new/a.inc"\n.lib "/new/b.lib" ff\n.lib ff\n* .include c.inc\n.endl ff\n'
    )

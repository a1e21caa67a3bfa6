"""Hostile places to write and damaged stores: export and plot targets that are the store, an
existing file, a folder, a read-only place or a full device; a new store on a full device; a store
file with a damaged block; an emptied ``schema_version`` table.  Each gives one line and a non-zero
exit, writes nothing and loses no file.

Full and read-only devices are real: small tmpfs mounts (root only; skipped with the reason
otherwise)."""

from __future__ import annotations

import contextlib
import os
import subprocess
import uuid
from pathlib import Path

import pandas as pd
import pytest

from tests.backends import BOTH
from tests.cli_helpers import CLI_FIT_OPTIONS
from tests.hostile import folder_state, hostile_store, one_line_error  # noqa: F401  (fixture)


@contextlib.contextmanager
def tmpfs(parent: Path, size: str, *options: str):
    """A real tmpfs of ``size`` (e.g. ``64k``) mounted under ``parent`` for the block."""
    if os.geteuid() != 0:
        pytest.skip("needs root to mount a small tmpfs (a real full or read-only device)")
    point = parent / f"mnt-{uuid.uuid4().hex[:8]}"
    point.mkdir()
    done = subprocess.run(["mount", "-t", "tmpfs", "-o", ",".join([f"size={size}", *options]), "tmpfs",
                           str(point)], capture_output=True, text=True)
    if done.returncode != 0:
        point.rmdir()
        pytest.skip(f"cannot mount a tmpfs here: {done.stderr.strip()}")
    try:
        yield point
    finally:
        subprocess.run(["umount", "-l", str(point)], check=False)
        point.rmdir()


def _fill(folder: Path) -> None:
    """Fill the device of ``folder`` to the last byte."""
    fd = os.open(folder / "ballast", os.O_WRONLY | os.O_CREAT)
    try:
        with contextlib.suppress(OSError):
            while os.write(fd, b"\0" * 4096):
                pass
        with contextlib.suppress(OSError):
            while os.write(fd, b"\0"):
                pass
    finally:
        os.close(fd)


# ---------------------------------------------------------------------------------------------
# export and plot targets

def test_export_never_writes_over_the_store(hostile_store, tmp_path):
    if not hostile_store.is_duckdb:
        pytest.skip("a DuckDB store is a file")
    store = Path(hostile_store.path)
    # the store under a name export accepts, reached directly and through a link
    disguised = tmp_path / "store.parquet"
    store.rename(disguised)
    try:
        link = tmp_path / "link.csv"
        link.symlink_to(disguised)
        for target in (disguised, link, Path(os.path.relpath(disguised))):
            done = hostile_store.runner.invoke(_app(), ["--store", str(disguised), "export", "1", str(target),
                                                        "--force"])
            one_line_error(done, "is the store itself", "another file name")
        link.unlink()
    finally:
        disguised.rename(store)


@BOTH
def test_export_asks_for_force_before_replacing_a_file(hostile_store):
    target = hostile_store.folder / "estimates.csv"
    target.write_text("keep me\n", encoding="utf-8")
    one_line_error(hostile_store.invoke("export", "1", target), "exists", "--force")
    assert target.read_text(encoding="utf-8") == "keep me\n"
    done = hostile_store.invoke("export", "1", target, "--force")
    assert done.exit_code == 0, done.output
    assert pd.read_csv(target).shape[0] > 0
    target.unlink()


@pytest.mark.parametrize("command", [["export", "1", "{dir}"], ["plot", "1", "--out", "{dir}"]])
def test_a_folder_is_not_a_target(hostile_store, command):
    folder = hostile_store.folder / ("sub.csv" if command[0] == "export" else "sub.png")
    folder.mkdir()
    args = [a.replace("{dir}", str(folder)) for a in command]
    one_line_error(hostile_store.invoke(*args), "is a folder", "file name inside it")
    assert list(folder.iterdir()) == []


@pytest.mark.parametrize("command", [["export", "1", "{dir}/e.parquet", "--force"],
                                     ["export", "1", "{dir}/e.csv", "--force"],
                                     ["plot", "1", "--out", "{dir}/c.png"]])
def test_a_full_device_leaves_no_partial_file_and_keeps_the_old_one(hostile_store, command):
    with tmpfs(hostile_store.folder, "64k") as mount:
        old = mount / Path(command[-2] if command[-1] == "--force" else command[-1]).name
        old.write_bytes(b"the previous file")
        _fill(mount)
        before = folder_state(mount)
        args = [a.replace("{dir}", str(mount)) for a in command]
        one_line_error(hostile_store.invoke(*args), "cannot write", "no space left on device",
                       "free some space")
        assert folder_state(mount) == before            # the old file intact, no partial file
        assert old.read_bytes() == b"the previous file"


@pytest.mark.parametrize("command", [["export", "1", "{dir}/e.parquet"], ["plot", "1", "--out", "{dir}/c.png"]])
def test_a_read_only_place_gives_one_line(hostile_store, command):
    with tmpfs(hostile_store.folder, "1m", "ro") as mount:
        args = [a.replace("{dir}", str(mount)) for a in command]
        one_line_error(hostile_store.invoke(*args), "cannot write", "read-only file system")
        assert list(mount.iterdir()) == []


# ---------------------------------------------------------------------------------------------
# the store itself

@pytest.mark.parametrize("size", ["16k", "1m"])
def test_a_new_store_on_a_full_device_is_not_left_behind(tmp_path, cli_base_store, size):
    """Before: the store reported success and could not be opened again (its log could not be
    replayed).  Now the new store is checkpointed when created; if that fails it is removed."""
    with tmpfs(tmp_path, size) as mount:
        store = mount / "new.duckdb"
        from typer.testing import CliRunner

        done = CliRunner().invoke(_app(), ["--store", str(store), "ingest", str(cli_base_store.csv),
                                           "--name", "trees", "--units", "percent"])
        one_line_error(done, f"cannot create store {store}", "No space left on device",
                       "free space")
        assert list(mount.iterdir()) == []


def _block_offset(path: Path, table: str) -> int:
    """File offset of the first data of ``table``'s first storage block (DuckDB's layout: three
    4 KiB headers, then blocks of ``block_size`` bytes, each starting with an 8-byte checksum)."""
    import duckdb

    con = duckdb.connect(str(path), read_only=True)
    try:
        block = con.execute(f"SELECT min(block_id) FROM pragma_storage_info('{table}') WHERE block_id >= 0"
                            ).fetchone()[0]
        size = con.execute("SELECT block_size FROM pragma_database_size()").fetchone()[0]
    finally:
        con.close()
    return 3 * 4096 + block * size + 64


@pytest.mark.parametrize("table, works, fails", [
    ("estimates", [["runs"], ["datasets"]], [["estimates", "1"], ["show", "1"], ["export", "1", "{dir}/e.parquet"]]),
    ("runs", [], [["runs"], ["show", "1"], ["fit", "--data", "trees", *CLI_FIT_OPTIONS]]),
])
def test_a_damaged_block_gives_one_line(cli_store, table, works, fails):
    """Bytes flipped in a DuckDB block in the middle of the file: a command that reads the block says the store
    is damaged and how to recover, at once (a damaged *block* was once taken for a lock and waited
    for), writing nothing; commands that do not read it work."""
    if not cli_store.is_duckdb:
        pytest.skip("damages the DuckDB file directly")
    path = Path(cli_store.path)
    offset = _block_offset(path, table)
    with open(path, "r+b") as fh:
        fh.seek(offset)
        chunk = fh.read(4096)
        fh.seek(offset)
        fh.write(bytes(b ^ 0xFF for b in chunk))
    damaged = path.read_bytes()
    for args in works:
        assert cli_store.invoke(*args).exit_code == 0
    for args in fails:
        args = [str(a).replace("{dir}", str(cli_store.folder)) for a in args]
        one_line_error(cli_store.invoke(*args), "damaged", "restore it from a backup copy")
    assert not (cli_store.folder / "e.parquet").exists()
    # the file as it was (a write that failed may leave DuckDB's empty write-ahead log beside it)
    assert path.read_bytes() == damaged
    wal = Path(str(path) + ".wal")
    assert not wal.exists() or wal.stat().st_size == 0


def test_an_emptied_schema_version_table_gives_one_line(cli_store):
    if not cli_store.is_duckdb:
        pytest.skip("edits the DuckDB file directly")
    import duckdb

    con = duckdb.connect(str(cli_store.path))
    con.execute("DELETE FROM schema_version")
    con.close()
    digest = cli_store.digest()
    for args in (["runs"], ["store", "info"], ["store", "upgrade"], ["fit", "--data", "trees"],
                 ["ingest", cli_store.csv, "--name", "again", "--units", "percent"]):
        one_line_error(cli_store.invoke(*args), "schema_version table is empty", "restore the store from a backup")
    assert cli_store.digest() == digest


def _app():
    from panel.cli.app import app

    return app

"""Helpers of the hostile-input tests (``tests/test_hostile_*.py``): every refusal is one line on
stderr naming the problem and the fix, a non-zero exit, no traceback, the store unchanged (same
bytes or rows, same row counts) and no file of the test's folder lost or changed."""

from __future__ import annotations

import hashlib
from pathlib import Path

import pytest


def one_line_error(result, *fragments: str, code: int = 1) -> str:
    """The single ``error: ...`` line of a refused command (exit ``code``)."""
    assert result.exit_code == code, result.output
    assert "Traceback" not in result.output
    lines = [line for line in result.stderr.splitlines() if line.strip()]
    assert len(lines) == 1, result.stderr
    assert lines[0].startswith("error: "), lines[0]
    for fragment in fragments:
        assert fragment in lines[0], lines[0]
    return lines[0]


def usage_error(result, *fragments: str) -> str:
    """A usage error (exit 2): click's box names the option; no traceback."""
    assert result.exit_code == 2, result.output
    assert "Traceback" not in result.output
    for fragment in fragments:
        assert fragment in " ".join(result.stderr.split()), result.stderr
    return result.stderr


def folder_state(folder: Path) -> dict[str, str]:
    """sha256 of every file under ``folder`` (what "no file lost or changed" means)."""
    return {str(p.relative_to(folder)): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(Path(folder).rglob("*")) if p.is_file()}


@pytest.fixture
def hostile_store(cli_store):
    """A private copy of the CLI session store; after the test, the store's bytes (or rows) and row
    counts and every file of the test's folder are as before (new files are allowed only where a
    test removes them or asserts them itself)."""
    digest, counts = cli_store.digest(), cli_store.counts()
    files = folder_state(cli_store.folder)
    yield cli_store
    assert cli_store.counts() == counts
    assert cli_store.digest() == digest
    after = folder_state(cli_store.folder)
    assert {k: v for k, v in after.items() if k in files} == files, "a file was lost or changed"

"""The migration files: which schema versions exist and which is the newest.

Only file listing, no database access, so that both the store handle (which checks versions) and the
migrations runner can use it without importing each other.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from pathlib import Path

from panel.store.errors import StoreError
from panel.store.resources import resource_dir

_FILE = re.compile(r"^(\d{4})_([a-z0-9_]+)\.sql$")


@dataclass(frozen=True)
class Migration:
    version: int
    description: str
    path: Path

    def statements(self, dialect: str) -> list[str]:
        """The file's statements for ``dialect`` (``"duckdb"``, ``"postgresql"``, ...)."""
        lines = [line for line in self.path.read_text(encoding="utf-8").splitlines()
                 if not line.lstrip().startswith("--")]
        body = "\n".join(lines)
        if dialect == "postgresql":
            body = re.sub(r"\bJSON\b", "JSONB", body)
        return [part.strip() for part in body.split(";") if part.strip()]


def migrations() -> list[Migration]:
    """All migration files, in version order; their numbers must run 1, 2, 3, ... without gaps."""
    folder = resource_dir("migrations")
    found = []
    for path in sorted(folder.glob("*.sql")):
        match = _FILE.match(path.name)
        if match is None:
            raise StoreError(f"migration file {path} is not named NNNN_words.sql; rename it")
        found.append(Migration(int(match.group(1)), match.group(2).replace("_", " "), path))
    numbers = [m.version for m in found]
    if numbers != list(range(1, len(found) + 1)):
        raise StoreError(f"migration files in {folder} are numbered {numbers}, not 1..{len(found)}; "
                         "fix the numbering")
    return found


def head_version() -> int:
    """The newest version the migration files reach."""
    return migrations()[-1].version

"""Writing output files safely: exports and charts.

- A file is written beside its target under a temporary name and moved into place only when it is
  complete, so a full device, a missing permission or an interrupted write never leaves a partial
  file, and never destroys the file it was meant to replace.
- A target that is a folder, the store itself (or its write-ahead log), or an existing file not
  meant to be replaced is refused before anything is written.
- CSV cells that a spreadsheet would run as a formula (text starting with ``=``, ``+``, ``-``,
  ``@``, a tab or a carriage return) are written with a single quote in front, the usual defence
  against formula injection; Parquet and JSON keep the text as it is.

Errors are :class:`OutputError`: one line naming the file, the problem and the fix.
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import Callable, Iterable


#: First characters that make a spreadsheet read a CSV cell as a formula (common practice: the
#: OWASP list of CSV-injection triggers).
FORMULA_STARTS = ("=", "+", "-", "@", "\t", "\r")


class OutputError(ValueError):
    """An output file that cannot or must not be written: one line naming the problem and the fix."""


def formula_safe(text):
    """``text`` with a single quote in front when a spreadsheet would run it as a formula; other
    values (numbers, None, NaN, safe text) unchanged."""
    if isinstance(text, str) and text.startswith(FORMULA_STARTS):
        return "'" + text
    return text


def formula_safe_frame(frame: pd.DataFrame) -> pd.DataFrame:
    """A copy of ``frame`` whose text cells and column names are :func:`formula_safe` (numeric,
    date and boolean columns untouched: a negative number is not a formula)."""
    from pandas.api.types import is_string_dtype  # pandas only when a CSV is written
    out = frame.copy()
    for name in out.columns:
        column = out[name]
        if column.dtype == object or is_string_dtype(column.dtype):
            out[name] = column.map(formula_safe).astype(column.dtype if column.dtype != object else object)
    out.columns = [formula_safe(c) if isinstance(c, str) else c for c in out.columns]
    return out


def _same_file(a: Path, b: Path) -> bool:
    try:
        return a.resolve() == b.resolve() or (a.exists() and b.exists() and os.path.samefile(a, b))
    except OSError:
        return False


def check_target(path, *, protected: Iterable[Path] = (), overwrite: bool = False,
                 force_hint: str = "--force") -> Path:
    """``path`` as a :class:`Path` if a new file may be written there; refuses a folder, a missing
    folder, one of ``protected`` (the store, its log) and, unless ``overwrite``, an existing file."""
    target = Path(path).expanduser()
    for guarded in protected:
        if guarded is not None and _same_file(target, Path(guarded)):
            raise OutputError(f"{target} is the store itself; give another file name (riskprem never "
                              "writes over its store)")
    if target.is_dir():
        raise OutputError(f"{target} is a folder; give a file name inside it")
    if not target.parent.is_dir():
        raise OutputError(f"cannot write {target}: folder {target.parent} does not exist; create it or "
                          "give another path")
    if target.exists() and not overwrite:
        raise OutputError(f"{target} exists; pass {force_hint} to replace it, or give another file name")
    return target


def write_atomically(target: Path, write: Callable[[Path], object]) -> Path:
    """Call ``write(temporary_path)`` for a file beside ``target``, then move it onto ``target``.
    On any failure the temporary file is removed and ``target`` is left as it was; an ``OSError``
    (full device, no permission, read-only file system) becomes :class:`OutputError`."""
    target = Path(target)
    temporary = target.with_name(f".{target.name}.{os.getpid()}.partial")
    try:
        write(temporary)
        os.replace(temporary, target)
    except BaseException as error:
        try:
            temporary.unlink(missing_ok=True)
        except OSError:
            pass
        if isinstance(error, OSError) or _is_io_error(error):
            raise OutputError(f"cannot write {target}: {_reason(error)}; free some space, or give a "
                              "writable place") from None
        raise
    return target


def _is_io_error(error: BaseException) -> bool:
    """DuckDB reports failed file writes as its own IOException (not an OSError); a damaged store
    also raises one, which is not a problem of the target."""
    text = str(error).lower()
    return ((type(error).__name__ in ("IOException", "IOError") or "no space left" in text)
            and "corrupt" not in text and "checksum" not in text)


def _reason(error: BaseException) -> str:
    """The cause in a few words: ``no space left on device``, ``read-only file system``..."""
    if isinstance(error, OSError) and error.strerror:
        return error.strerror.lower()
    text = (str(error).strip().splitlines() or [type(error).__name__])[0]
    if '": ' in text:   # DuckDB: 'IO Error: Could not write file "PATH": No space left on device'
        text = text.rsplit('": ', 1)[-1]
    return text[:1].lower() + text[1:]

"""Reading the data file a block names: readers table, containment, fingerprint.

A block's ``data`` path is relative to the document. It must stay inside the
project (the nearest folder holding ``_quarto.yml``, else the document's folder)
unless the caller allows outside paths explicitly; symlinks are resolved before
the check, so a link cannot smuggle a path out.
"""

from __future__ import annotations

import hashlib
import os
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

from premises.errors import DataError, Location
from premises.results import DataInfo

if TYPE_CHECKING:
    import pandas as pd

__all__ = [
    "MAX_DATA_BYTES",
    "READERS",
    "Table",
    "find_project_root",
    "load_table",
    "resolve_data_path",
    "row_ids",
]

MAX_DATA_BYTES = 2 * 1024**3
"""Largest data file read (2 GiB); ``--max-data-bytes`` changes it."""


@dataclass(frozen=True)
class Table:
    """A data file read into memory, with what identifies it."""

    frame: pd.DataFrame
    info: DataInfo
    path: Path
    """Resolved path on disk."""


def _read_delimited(path: Path, sep: str) -> pd.DataFrame:
    import pandas as pd

    try:
        # utf-8-sig strips a byte-order mark written by spreadsheet programs.
        return pd.read_csv(path, sep=sep, encoding="utf-8-sig", low_memory=False)
    except UnicodeDecodeError as exc:
        raise DataError(
            f"the file is not valid UTF-8 text (byte {exc.start}).",
            hint="Save it as UTF-8 (most spreadsheet programs offer 'CSV UTF-8').",
        ) from exc
    except pd.errors.EmptyDataError as exc:
        raise DataError("the file is empty.", hint="Point 'data' at a file with a header and rows.") from exc
    except pd.errors.ParserError as exc:
        raise DataError(
            f"the file could not be parsed as {'tab' if sep == chr(9) else 'comma'}-separated text: "
            f"{str(exc).strip().rstrip('.')}.",
            hint="Check the delimiter and quoting, or use a .tsv/.csv extension that matches.",
        ) from exc


def _read_csv(path: Path) -> pd.DataFrame:
    return _read_delimited(path, ",")


def _read_tsv(path: Path) -> pd.DataFrame:
    return _read_delimited(path, "\t")


def _read_parquet(path: Path) -> pd.DataFrame:
    import pandas as pd

    return pd.read_parquet(path)


def _read_xlsx(path: Path) -> pd.DataFrame:
    import pandas as pd

    return pd.read_excel(path, engine="openpyxl")


def _read_dta(path: Path) -> pd.DataFrame:
    import pandas as pd

    return pd.read_stata(path)


def _read_sav(path: Path) -> pd.DataFrame:
    import pandas as pd

    return pd.read_spss(path)


READERS: dict[str, tuple[str, Callable[[Path], pd.DataFrame]]] = {
    ".csv": ("csv", _read_csv),
    ".tsv": ("tsv", _read_tsv),
    ".tab": ("tsv", _read_tsv),
    ".parquet": ("parquet", _read_parquet),
    ".pq": ("parquet", _read_parquet),
    ".xlsx": ("xlsx", _read_xlsx),
    ".dta": ("dta", _read_dta),
    ".sav": ("sav", _read_sav),
}
"""Data readers by file extension: (format name, reader)."""


def find_project_root(document_dir: Path) -> Path:
    """The nearest ancestor holding ``_quarto.yml``, else ``document_dir`` itself."""
    here = document_dir.resolve()
    for folder in (here, *here.parents):
        if (folder / "_quarto.yml").is_file() or (folder / "_quarto.yaml").is_file():
            return folder
    return here


def resolve_data_path(
    data: str, document_dir: Path, where: Location, *, allow_outside: bool = False
) -> Path:
    """Resolve ``data`` against the document's folder and check it stays in the project."""
    if "\0" in data:
        raise DataError(
            f"the data path {data!r} contains a NUL character.",
            where,
            hint="Write the file name without control characters.",
        )
    raw = Path(data)
    if raw.is_absolute() and not allow_outside:
        raise DataError(
            f"the data path '{data}' is absolute.",
            where,
            hint="Write it relative to the document, or pass --allow-outside-data.",
        )
    candidate = (document_dir / raw) if not raw.is_absolute() else raw
    resolved = _resolve(candidate, data, where)
    root = find_project_root(document_dir)
    if not allow_outside and not resolved.is_relative_to(root):
        raise DataError(
            f"the data path '{data}' leads outside the project folder {root}.",
            where,
            hint="Move the data into the project, or pass --allow-outside-data if you trust the document.",
        )
    try:
        exists, is_file = resolved.exists(), resolved.is_file()
    except OSError as exc:
        raise _path_problem(data, where, exc) from exc
    if not exists and candidate.is_symlink():
        raise DataError(f"the data file '{data}' is a symbolic link to a file that does not exist.", where, hint="Point the link at the data file, or name the file itself.")
    if not exists:
        nearby = sorted(p.name for p in resolved.parent.glob("*"))[:8] if resolved.parent.is_dir() else []
        hint = "Check the path; it is relative to the document's folder."
        if nearby:
            hint += " Files there: " + ", ".join(nearby) + "."
        raise DataError(f"the data file '{data}' does not exist.", where, hint=hint)
    if not is_file:
        raise DataError(f"the data path '{data}' is not a file.", where, hint="Name a data file.")
    return resolved


def _resolve(candidate: Path, data: str, where: Location) -> Path:
    """``candidate.resolve()``, with a link loop or an impossible name as a DataError."""
    try:
        return candidate.resolve()
    except (OSError, RuntimeError) as exc:  # RuntimeError: a symlink loop before Python 3.13
        raise _path_problem(data, where, exc) from exc


def _path_problem(data: str, where: Location, exc: BaseException) -> DataError:
    import errno

    code = getattr(exc, "errno", None)
    if isinstance(exc, RuntimeError) or code == errno.ELOOP:
        reason = "its symbolic links lead back to themselves (a loop)"
    elif code == errno.ENAMETOOLONG:
        reason = "the name is too long for this system"
    else:
        reason = getattr(exc, "strerror", None) or str(exc)
    shown = data if len(data) <= 80 else data[:60] + f"... ({len(data)} characters)"
    return DataError(f"the data path '{shown}' cannot be used: {reason}.", where, hint="Check the path and any links along it.")

def _sha256(path: Path) -> str:
    digest = hashlib.sha256()
    with path.open("rb") as handle:
        for chunk in iter(lambda: handle.read(1 << 20), b""):
            digest.update(chunk)
    return digest.hexdigest()


def _read_head(path: Path, data: str, where: Location) -> bytes:
    """The file's first bytes; an unreadable file is a DataError."""
    try:
        with path.open("rb") as handle:
            return handle.read(8192)
    except OSError as exc:
        raise DataError(
            f"the data file '{data}' cannot be read: {exc.strerror or exc}.",
            where,
            hint="Check its permissions.",
        ) from exc


def _check_text_head(head: bytes, data: str, fmt: str, where: Location) -> None:
    """Refuse UTF-16 and binary bytes in a delimited text file, with what to do."""
    if fmt not in ("csv", "tsv"):
        return
    pairs = head[: len(head) - len(head) % 2]
    utf16 = head.startswith((b"\xff\xfe", b"\xfe\xff")) or (
        # ASCII text as UTF-16 without a byte-order mark: every other byte is NUL.
        len(pairs) >= 4 and any(pairs[0::2]) != any(pairs[1::2])
    )
    if utf16:
        raise DataError(
            f"the data file '{data}' is UTF-16 text.",
            where,
            hint="Save it as UTF-8 (most spreadsheet programs offer 'CSV UTF-8').",
        )
    if b"\0" in head:
        raise DataError(
            f"the data file '{data}' holds binary bytes, not {fmt} text.",
            where,
            hint="Check that the file really is text, or give it the extension of its format.",
        )


def _header_names(path: Path, sep: str) -> list[str]:
    """The header row as written (pandas renames a repeated name to 'x.1')."""
    import csv

    with path.open(encoding="utf-8-sig", newline="") as handle:
        for row in csv.reader(handle, delimiter=sep):
            if any(cell.strip() for cell in row):
                return [cell.strip() for cell in row]
    return []


_SEPARATORS = {";": "semicolons", "\t": "tabs", ",": "commas", "|": "bars"}


def _check_columns(frame: pd.DataFrame, path: Path, data: str, fmt: str, where: Location) -> None:
    """Refuse a header that repeats a name, or a file read with the wrong separator."""
    names = _header_names(path, "\t" if fmt == "tsv" else ",") if fmt in ("csv", "tsv") else []
    names = names or [str(c).strip() for c in frame.columns]
    seen: set[str] = set()
    for name in names:
        if name in seen:
            raise DataError(
                f"the header of '{data}' names the column '{name}' twice.",
                where,
                hint="Rename one of them; the block finds columns by name.",
            )
        seen.add(name)
    if fmt in ("csv", "tsv") and len(frame.columns) == 1:
        sep = "\t" if fmt == "tsv" else ","
        name = str(frame.columns[0])
        found = next((s for s in _SEPARATORS if s != sep and s in name), None)
        if found is not None:
            fix = {"\t": "Give it the extension .tsv.", ",": "Give it the extension .csv."}.get(
                found, "Save it with commas (what spreadsheet programs call CSV), or with tabs as .tsv."
            )
            raise DataError(
                f"the data file '{data}' has a single column named {name!r}: its fields seem to be "
                f"separated by {found!r} ({_SEPARATORS[found]}), not {_SEPARATORS[sep]}.",
                where,
                hint=fix,
            )


def load_table(
    data: str,
    document_dir: Path,
    where: Location,
    *,
    allow_outside: bool = False,
    max_bytes: int = MAX_DATA_BYTES,
) -> Table:
    """Read the block's data file.

    Parameters
    ----------
    data
        The path as written in the block.
    document_dir
        Folder of the document; ``data`` is relative to it.
    where
        Location of the ``data`` key, for messages.

    Examples
    --------
    >>> table = load_table("data/plots.csv", Path("example_project"), Location())  # doctest: +SKIP
    >>> table.info.rows_read  # doctest: +SKIP
    180
    """
    path = resolve_data_path(data, document_dir, where, allow_outside=allow_outside)
    suffix = path.suffix.lower()
    if suffix not in READERS:
        raise DataError(
            f"cannot read '{data}': unknown file type '{suffix or '(none)'}'.",
            where,
            hint="Use one of " + ", ".join(sorted(READERS)) + ".",
        )
    fmt, reader = READERS[suffix]
    size = path.stat().st_size
    if size > max_bytes:
        raise DataError(
            f"the data file '{data}' is {size:,} bytes, over the limit of {max_bytes:,}.",
            where,
            hint="Pass --max-data-bytes to raise the limit, or use parquet.",
        )
    if size == 0:
        raise DataError(f"the data file '{data}' is empty.", where, hint="Point 'data' at a file with rows.")
    _check_text_head(_read_head(path, data, where), data, fmt, where)
    try:
        frame = reader(path)
    except DataError as exc:
        raise DataError(f"cannot read '{data}': {exc.problem}", where, hint=exc.hint) from exc
    except Exception as exc:
        raise DataError(
            f"cannot read '{data}' as {fmt}: {str(exc).strip().splitlines()[0].rstrip('.') if str(exc).strip() else type(exc).__name__}.",
            where,
            hint="Check that the file is a valid " + fmt + " file.",
        ) from exc
    if len(frame) == 0:
        raise DataError(
            f"the data file '{data}' has a header but no rows.", where, hint="Add data rows."
        )
    _check_columns(frame, path, data, fmt, where)
    frame.columns = [str(c).strip() for c in frame.columns]
    info = DataInfo(
        path=data.replace(os.sep, "/"),
        sha256=_sha256(path),
        rows_read=len(frame),
        columns=tuple(frame.columns),
        format=fmt,
    )
    return Table(frame=frame, info=info, path=path)


def row_ids(frame: pd.DataFrame, id_column: str | None, where: Location) -> list[str]:
    """Ids that name rows in the ledger: ``id_column`` values, else 1-based row numbers."""
    if id_column is None:
        return [str(i + 1) for i in range(len(frame))]
    if id_column not in frame.columns:
        from difflib import get_close_matches

        close = get_close_matches(id_column, list(frame.columns), n=1)
        hint = f"Did you mean '{close[0]}'? " if close else ""
        raise DataError(
            f"the id_column '{id_column}' is not a column of the data.",
            where,
            hint=hint + "Columns: " + ", ".join(map(str, frame.columns[:30])) + ".",
        )
    values = frame[id_column]
    if values.isna().any():
        missing_rows = [str(i + 1) for i in values[values.isna()].index[:5]]
        raise DataError(
            f"the id_column '{id_column}' is empty in rows {', '.join(missing_rows)}.",
            where,
            hint="Give every row an id, or drop the id_column key to use row numbers.",
        )
    ids = [_id_text(v) for v in values]
    seen: set[str] = set()
    dupes: list[str] = []
    for value in ids:
        if value in seen and value not in dupes:
            dupes.append(value)
        seen.add(value)
    if dupes:
        raise DataError(
            f"the id_column '{id_column}' repeats ids: {', '.join(dupes[:5])}"
            + (f" and {len(dupes) - 5} more" if len(dupes) > 5 else "")
            + ".",
            where,
            hint="Ids must be unique; choose another column or fix the duplicates.",
        )
    return ids


def _id_text(value: object) -> str:
    # Integers read as floats (because of a missing value elsewhere) print without ".0".
    if isinstance(value, float) and value.is_integer():
        return str(int(value))
    return str(value)

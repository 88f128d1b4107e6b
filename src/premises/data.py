"""Reading the data file a block names: readers table, containment, fingerprint.

A block's ``data`` path is relative to the document. It must stay inside the
project (the nearest folder holding ``_quarto.yml``, else the document's folder)
unless the caller allows outside paths explicitly; symlinks are resolved before
the check, so a link cannot smuggle a path out.
"""

from __future__ import annotations

import hashlib
import os
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Callable

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
            f"{str(exc).strip()}",
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
    raw = Path(data)
    if raw.is_absolute() and not allow_outside:
        raise DataError(
            f"the data path '{data}' is absolute.",
            where,
            hint="Write it relative to the document, or pass --allow-outside-data.",
        )
    candidate = (document_dir / raw) if not raw.is_absolute() else raw
    resolved = candidate.resolve()
    root = find_project_root(document_dir)
    if not allow_outside and not resolved.is_relative_to(root):
        raise DataError(
            f"the data path '{data}' leads outside the project folder {root}.",
            where,
            hint="Move the data into the project, or pass --allow-outside-data if you trust the document.",
        )
    if not resolved.exists():
        nearby = sorted(p.name for p in resolved.parent.glob("*"))[:8] if resolved.parent.is_dir() else []
        hint = "Check the path; it is relative to the document's folder."
        if nearby:
            hint += " Files there: " + ", ".join(nearby) + "."
        raise DataError(f"the data file '{data}' does not exist.", where, hint=hint)
    if not resolved.is_file():
        raise DataError(f"the data path '{data}' is not a file.", where, hint="Name a data file.")
    return resolved


def _sha256(path: Path) -> str:
    digest = hashlib.sha256()
    with path.open("rb") as handle:
        for chunk in iter(lambda: handle.read(1 << 20), b""):
            digest.update(chunk)
    return digest.hexdigest()


def _looks_binary(path: Path, fmt: str) -> bool:
    if fmt not in ("csv", "tsv"):
        return False
    with path.open("rb") as handle:
        return b"\0" in handle.read(8192)


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
    if _looks_binary(path, fmt):
        raise DataError(
            f"the data file '{data}' holds binary bytes, not {fmt} text.",
            where,
            hint="Check that the file really is text, or give it the extension of its format.",
        )
    try:
        frame = reader(path)
    except DataError as exc:
        raise DataError(f"cannot read '{data}': {exc.problem}", where, hint=exc.hint) from exc
    except (ValueError, OSError, ImportError) as exc:
        raise DataError(
            f"cannot read '{data}' as {fmt}: {str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__}.",
            where,
            hint="Check that the file is a valid " + fmt + " file.",
        ) from exc
    if len(frame) == 0:
        raise DataError(
            f"the data file '{data}' has a header but no rows.", where, hint="Add data rows."
        )
    frame.columns = [str(c).strip() for c in frame.columns]
    info = DataInfo(
        path=data.replace(os.sep, "/"),
        sha256=_sha256(path),
        rows_read=int(len(frame)),
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

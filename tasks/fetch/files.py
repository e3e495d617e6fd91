"""Which kind of source a location is, and the data files a folder holds.

One rule for every command (``detect`` and the fleet commands alike): a
``.parquet``/``.parq``/``.pq`` or ``.csv``/``.csv.gz`` file, a folder of files of
one of those formats (names starting with '.' or '_' skipped), or a database URL.
"""

from __future__ import annotations

import os
import re
from pathlib import Path
from typing import Literal

from changekind.tasks.errors import SourceError
from changekind.tasks.fetch.values import CSV_SUFFIXES, PARQUET_SUFFIXES, SourceKind

# ---------------------------------------------------------------------------
# Kind inference
# ---------------------------------------------------------------------------

FileKind = Literal["parquet", "csv"]

_URL = re.compile(r"^[A-Za-z][A-Za-z0-9+.\-]*://")


def _infer_kind(location: str) -> SourceKind:
    if _URL.match(location):
        return "sql"
    path = Path(location)
    if not path.exists():
        raise SourceError(
            f"source {location!r} does not exist; give a .parquet or .csv file, a directory "
            "of them, or a database URL such as sqlite:///metrics.db"
        )
    if path.is_file():
        kind = file_format(path)
        if kind is not None:
            return kind
        raise SourceError(
            f"source file {location!r} is neither .parquet nor .csv (unknown file type "
            f"{path.suffix or '(no suffix)'!r}); give a file ending in "
            f"{', '.join(PARQUET_SUFFIXES + CSV_SUFFIXES)} (convert it or rename it after its "
            "format) or a folder of them"
        )
    names = [f.lower() for f in _data_files(path, PARQUET_SUFFIXES + CSV_SUFFIXES)]
    has_parquet = any(f.endswith(PARQUET_SUFFIXES) for f in names)
    has_csv = any(f.endswith(CSV_SUFFIXES) for f in names)
    if has_parquet and has_csv:
        raise SourceError(
            f"directory {location + os.sep!r} holds both .parquet and .csv files; point at a "
            "directory of one format"
        )
    if has_parquet:
        return "parquet"
    if has_csv:
        return "csv"
    raise SourceError(
        f"directory {location + os.sep!r} holds no .parquet or .csv files; point at the "
        "directory the data was written to"
    )


def file_format(path: Path) -> FileKind | None:
    """``"parquet"`` or ``"csv"`` by the file's suffix (module docstring); None otherwise."""
    name = path.name.lower()
    if name.endswith(PARQUET_SUFFIXES):
        return "parquet"
    if name.endswith(CSV_SUFFIXES):
        return "csv"
    return None


def series_name(path: Path) -> str:
    """The series id a one-series file stands for: its name without the format's suffix
    (``write-latency.csv.gz`` -> ``write-latency``)."""
    name = path.name
    for suffix in sorted(CSV_SUFFIXES + PARQUET_SUFFIXES, key=len, reverse=True):
        if name.lower().endswith(suffix):
            return name[: len(name) - len(suffix)] or name
    return path.stem


def _data_files(root: Path, suffixes: tuple[str, ...]) -> list[str]:
    """Data files under ``root``, skipping names starting with '.' or '_'."""
    found = []
    for dirpath, dirnames, filenames in os.walk(root):
        dirnames[:] = sorted(d for d in dirnames if not d.startswith((".", "_")))
        for name in sorted(filenames):
            if not name.startswith((".", "_")) and name.lower().endswith(suffixes):
                found.append(os.path.join(dirpath, name))
    return found

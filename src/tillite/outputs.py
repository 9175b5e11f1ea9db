"""The files tillite writes (model files, reports): which existing file an output may replace.

One rule for every command that writes a file (`segment --out`, `report --out`, `demo --out/--report`,
`store build --out`): an output never goes over what the same run reads (the database, a source
file, the model file read, or another output of the run), nor over an existing file that is not
tillite's own output of that kind. Tillite's earlier output of the same kind is replaced, so reruns
work; an empty file holds nothing to lose and is replaced too. A model file is recognised by its
content (``"format": "tillite-model"``); a report by the marker tillite writes into it
(``REPORT_MARKER`` in HTML and Markdown, ``"format": "tillite-report"`` in JSON), and a report
written before the marker by its fixed first lines and last line (HTML) or its own section heading
(Markdown). The write itself goes through a temporary file and a rename
(``model.write_text_atomically``), so a failed write never leaves half a file.

Imports only the standard library, so the CLI can check its outputs before any heavy work.
"""

from __future__ import annotations

import fnmatch
import glob
import json
import os
import re
from pathlib import Path
from typing import Sequence

from .errors import InputError

__all__ = ["MODEL_FILE", "REPORT", "REPORT_MARKER", "OutputRefused", "check_output", "check_duckdb_file", "has_duckdb_header", "kind_of_file", "is_input"]

MODEL_FILE = "model file"
REPORT = "report"

#: What tillite writes into every HTML and Markdown report (an HTML comment, invisible in both), so that a
#: later run recognises the file as a report of its own.
REPORT_MARKER = "<!-- written by tillite report -->"

#: The model and report files' "format" values (model.FORMAT_NAME, report.REPORT_FORMAT; a test checks).
_JSON_FORMATS = {"tillite-model": MODEL_FILE, "tillite-report": REPORT}

#: Reports written before REPORT_MARKER: how an HTML one began and ended, and a Markdown one's own heading.
_OLD_HTML_HEAD = '<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8">'
_OLD_HTML_TAIL = "no row left it.</small></p></body></html>"
_OLD_MD_HEAD = "# Segments of "
_OLD_MD_SECTION = "Profile (segment mean; sd from the overall mean)"

#: DuckDB's magic bytes, after the 8-byte checksum at the start of its database files.
DUCKDB_MAGIC = b"DUCK"

#: How much of a file's start and end is read to recognise a report by its marker.
_PEEK = 4096

#: SOURCE strings that name a server rather than a file (postgresql://..., spark://..., local[2], yarn).
_NOT_A_FILE = re.compile(r"^([a-z][a-z0-9+.-]*://|local(\[[0-9*]+(,[0-9]+)?\])?$|yarn$)")


class OutputRefused(InputError):
    """An output option names a file tillite must not write over."""


def check_output(path: str | os.PathLike[str], option: str, kind: str,
                 inputs: Sequence[tuple[str, str | os.PathLike[str] | None]] = ()) -> None:
    """Refuse, in one line naming ``option`` and the file, to write a ``kind`` (MODEL_FILE or REPORT) to ``path``
    when it is one of ``inputs`` (pairs of what the file is to this run, e.g. "the database", and its
    location: a path, a glob, or a folder of Parquet files; None is skipped), when it or its folder is not a
    place for a file, or when it exists and is not tillite's own ``kind``.  Called before the run's work, so
    a refusal costs nothing."""
    path = Path(path)
    for what, location in inputs:
        if location is not None and is_input(path, str(location)):
            shown = "" if os.fspath(location) == os.fspath(path) else f" ({location})"
            raise OutputRefused(f"{option} {path} is {what} of this run{shown}; tillite never writes over what it "
                                f"reads or writes in the same run: choose another {option}")
    if path.is_dir():
        raise OutputRefused(f"{option} {path} is a folder; give a file name")
    folder = path.parent if str(path.parent) else Path(".")
    if not folder.is_dir():
        raise OutputRefused(f"folder {folder} for {option} {path} does not exist")
    if not path.exists() and not path.is_symlink():
        return
    if path.exists() and not path.is_file():  # a device, pipe or socket: never opened, never replaced by a file
        raise OutputRefused(f"{option} {path} is not a regular file (a device, pipe or socket); give a file name")
    found = kind_of_file(path)
    if found != kind and found != "empty":
        said = f"a tillite {found}" if found else f"not a {kind} tillite wrote"
        raise OutputRefused(f"{option} {path} exists and is {said}; tillite replaces only its own earlier {kind}s: "
                            f"choose another {option} (or move that file away)")


def has_duckdb_header(path: str | os.PathLike[str]) -> bool:
    """Whether the file at ``path`` starts as a DuckDB database does (DUCKDB_MAGIC after the 8-byte checksum of
    its main header).  OSError when it cannot be read."""
    with open(path, "rb") as fh:
        return fh.read(12)[8:12] == DUCKDB_MAGIC


def check_duckdb_file(path: str | os.PathLike[str], option: str) -> None:
    """Refuse, in one line naming ``option``, an existing ``path`` that is not a DuckDB database file (its
    header's magic bytes): tillite keeps what it writes there (a store) only in DuckDB files.  A missing file
    is fine (DuckDB creates it)."""
    path = Path(path)
    if not path.exists():
        return
    if not path.is_file():
        raise OutputRefused(f"{option} {path} is not a file; give a DuckDB database file")
    try:
        duckdb_file = has_duckdb_header(path)
    except OSError as err:
        raise OutputRefused(f"{option} {path} cannot be read: {err.strerror}") from None
    if not duckdb_file:
        raise OutputRefused(f"{option} {path} exists and is not a DuckDB database; tillite writes only into DuckDB "
                            f"database files and never over another file: give another {option}")


def kind_of_file(path: str | os.PathLike[str]) -> str | None:
    """MODEL_FILE or REPORT for a file tillite wrote, "empty" for an empty file, else None."""
    path = Path(path)
    try:
        size = path.stat().st_size
        with path.open("rb") as fh:
            head = fh.read(_PEEK)
            fh.seek(max(size - _PEEK, 0))
            tail = fh.read(_PEEK)
    except OSError:
        return None
    if not head.strip():
        return "empty" if size == 0 else None
    if head.lstrip().startswith(b"{"):
        return _kind_of_json(path)
    try:
        head_text, tail_text = head.decode("utf-8"), tail.decode("utf-8", errors="replace")
    except UnicodeDecodeError:
        return None
    if REPORT_MARKER in head_text or REPORT_MARKER in tail_text:
        return REPORT
    if head_text.startswith(_OLD_HTML_HEAD) and tail_text.rstrip().endswith(_OLD_HTML_TAIL):
        return REPORT
    if head_text.startswith(_OLD_MD_HEAD) and _OLD_MD_SECTION in _text(path):
        return REPORT
    return None


def _kind_of_json(path: Path) -> str | None:
    try:
        data = json.loads(_text(path))
    except ValueError:
        return None
    return _JSON_FORMATS.get(data.get("format")) if isinstance(data, dict) and isinstance(data.get("format"), str) else None


def _text(path: Path) -> str:
    try:
        return path.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError):
        return ""


def is_input(path: str | os.PathLike[str], location: str) -> bool:
    """Whether ``path`` is the file ``location`` names, one its glob matches (or would match), or a Parquet file
    of its folder; links to such a file count (os.path.samefile).  Servers (postgresql://..., Spark masters) never."""
    path = Path(path)
    if not location or _NOT_A_FILE.match(location):
        return False
    if os.path.isdir(location):
        location = os.path.join(location, "**", "*.parquet")
    target = os.path.realpath(path)
    if os.path.realpath(location) == target or fnmatch.fnmatch(target, os.path.realpath(location)):
        return True
    candidates = glob.glob(location, recursive=True) if any(ch in location for ch in "*?[") else [location]
    return path.exists() and any(_same_file(path, c) for c in candidates)


def _same_file(a: Path, b: str) -> bool:
    try:
        return os.path.samefile(a, b)
    except OSError:
        return False

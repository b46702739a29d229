"""Scan files of text rows (``.xyz``, ``.txt``, ``.csv``): delimiters, decimal commas, header lines
and normal columns, read in chunks (see :mod:`shapes.data._scanfile` for the format's rules)."""

from __future__ import annotations

import itertools
import re
from pathlib import Path

import numpy as np

from shapes.errors import MeshError
from shapes.data._scanfile_rows import _TEXT_CHUNK, _numbers

_HEADER_LINES = 100  # leading non-numeric lines accepted as a header
_UNIT_TOL = 1e-2  # |n| within 1 +- this: the last three of six columns are normals

_COMMENT = ("#", "//", "%")
_DECIMAL_COMMA = re.compile(r"^[+-]?\d*,\d+([eE][+-]?\d+)?$")
_NUMBER = re.compile(r"^[+-]?(\d+\.?\d*|\.\d+)([eE][+-]?\d+)?$|^[+-]?(nan|inf|infinity)$", re.IGNORECASE)
_WHOLE = re.compile(r"^[+-]?\d+$")


def _dialect(line: str) -> tuple[str | None, bool]:
    """(delimiter, decimal comma) of a data line: ';', ',' or None (whitespace)."""
    s = line.strip().strip(";")
    if ";" in s:
        return ";", "," in s
    tokens = s.split()
    if len(tokens) > 1 and any("," in t for t in tokens) and all(_DECIMAL_COMMA.match(t) or _NUMBER.match(t)
                                                                 for t in tokens):
        return None, True  # -0,1072 -9,1757 3,2
    if "," in s:
        return ",", False
    return None, False


def _split(line: str, delimiter: str | None, comma: bool) -> list[str]:
    s = line.strip()
    if delimiter is not None:
        s = s.strip(delimiter + " \t")
    if comma:
        s = s.replace(",", ".")
    return [t.strip() for t in s.split(delimiter)] if delimiter else s.split()


def _text_lines(path: Path):
    """(line number, stripped line) of the non-blank, non-comment lines, decoded as UTF-8."""
    with open(path, encoding="utf-8", errors="strict", newline=None) as handle:
        lineno = 0
        try:
            for lineno, line in enumerate(handle, 1):
                line = line.strip()
                if line and not line.startswith(_COMMENT):
                    yield lineno, line
        except UnicodeDecodeError as exc:
            raise MeshError(f"scan file {path} is not a UTF-8 text file (undecodable byte after line {lineno}); "
                            "expected rows of x y z.") from None


def _count_lines(path: Path) -> int:
    count, last = 0, b"\n"
    with open(path, "rb") as handle:
        while block := handle.read(1 << 24):
            count += block.count(b"\n")
            last = block[-1:]
    return count + (last != b"\n")


def _read_text(path: Path, collector_for) -> tuple[np.ndarray, np.ndarray | None, list[str]]:
    with open(path, "rb") as handle:
        head = handle.read(1 << 16)
    if b"\x00" in head:
        raise MeshError(f"scan file {path} is binary (it holds NUL bytes), not text; expected rows of x y z.")
    lines = _text_lines(path)
    header, first, skipped = None, None, 0
    for lineno, line in lines:
        if _numbers(_split(line, *_dialect(line))) is not None:
            first = (lineno, line)
            break
        header, skipped = line, skipped + 1  # the last header line names the columns
        if skipped > _HEADER_LINES:
            raise MeshError(f"scan file {path}, line {lineno}: expected numbers, found '{line[:60]}'.")
    if first is None:
        if header is None:
            raise MeshError(f"scan file {path} has no data lines; expected rows of x y z.")
        raise MeshError(f"scan file {path} has a header but no data lines; expected rows of x y z.")
    delimiter, comma = _dialect(first[1])
    columns = len(_split(first[1], delimiter, comma))
    if columns < 3:
        raise MeshError(f"scan file {path}, line {first[0]}: expected at least 3 columns (x y z), found {columns}.")
    names = [t.strip().lower() for t in re.split(r"[,;\s]+", header.strip())] if header else []
    named = all(k in names for k in ("nx", "ny", "nz"))
    normal_cols = [names.index(k) for k in ("nx", "ny", "nz")] if named else ([3, 4, 5] if columns == 6 else None)
    if normal_cols is not None and max(normal_cols) >= columns:
        normal_cols = None
    collector = collector_for(_count_lines(path))
    whole, chunk = True, [first]
    for block in iter(lambda: list(itertools.islice(lines, _TEXT_CHUNK)), []):
        chunk.extend(block)
        whole = whole and _parse_text_chunk(path, chunk, delimiter, comma, columns, collector, normal_cols)
        chunk = []
    if chunk:
        whole = whole and _parse_text_chunk(path, chunk, delimiter, comma, columns, collector, normal_cols)
    if delimiter == "," and whole and 4 <= columns <= 6:
        raise MeshError(f"scan file {path} holds only whole numbers in {columns} comma-separated columns: decimal "
                        "commas (e.g. '-0,1072') with ',' also between columns cannot be read unambiguously; "
                        "separate the columns with ';' or tabs.")
    points, normals, _ = collector.arrays()
    notes = collector.note() + (["decimal commas read"] if comma else [])
    if normals is not None and not named:
        length = np.linalg.norm(normals, axis=1)
        if not (np.abs(length - 1.0) <= _UNIT_TOL).all():
            normals = None
            notes.append("columns 4-6 are not unit vectors (colours?): ignored")
    if normal_cols is None and columns > 3:
        notes.append(f"columns 4-{columns} ignored")
    return points, normals, notes


def _parse_text_chunk(path, chunk, delimiter, comma, columns, collector, normal_cols) -> bool:
    """Parse one block of (lineno, line); return whether every value was a whole number."""
    text = [line.replace(",", ".") if comma else line for _, line in chunk]
    if delimiter is not None:
        text = [t.strip().strip(delimiter + " \t") for t in text]
    try:
        with np.errstate(all="ignore"):
            table = np.loadtxt(text, delimiter=delimiter, dtype=np.float64, ndmin=2, comments=None)
    except ValueError:
        table = None
    if table is None or table.shape[1] != columns:
        for lineno, line in chunk:  # find and name the first bad line
            tokens = _split(line, delimiter, comma)
            values = _numbers(tokens)
            if values is None:
                raise MeshError(f"scan file {path}, line {lineno}: expected numbers, found '{line[:60]}'.")
            if len(values) < 3:
                raise MeshError(f"scan file {path}, line {lineno}: expected at least 3 columns (x y z), "
                                f"found {len(values)}.")
            if len(values) != columns:
                raise MeshError(f"scan file {path}, line {lineno}: expected {columns} columns like line "
                                f"{chunk[0][0]}, found {len(values)}.")
        raise MeshError(f"scan file {path}: lines {chunk[0][0]}-{chunk[-1][0]} could not be parsed as numbers.")
    normals = table[:, normal_cols] if normal_cols is not None else None
    collector.add(table[:, :3], normals)
    if delimiter != ",":
        return False
    return all(_WHOLE.match(tok) for _, line in chunk[:100] for tok in _split(line, delimiter, comma))

"""Reading the data files a run names (CSV, NPZ, JSON): formats, checks and messages.

Nothing here executes code or unpickles: NPZ is read with ``allow_pickle=False``.

The rules (every violation is a one-line :class:`~chainyard.errors.ConfigError` naming
``model.data``, the file, and the column, line or member):

CSV
    UTF-8 text without a byte-order mark. The first line is a header of unique, non-empty
    column names; at least one data row follows; every row has as many fields as the header
    (lines that are entirely empty are skipped). A column in which any cell is a number is
    numeric: then every cell must be a finite number (an empty cell, ``n/a``, ``NaN`` or
    ``inf`` is an error naming column, line and value). A column in which no cell is a number
    is a label column and is passed as an array of str. Line numbers count from 1, the header
    being line 1.
NPZ
    Arrays of numbers, bools or strings; an array of Python objects is refused (reading it
    would need pickle).
JSON
    Standard JSON (RFC 8259): ``NaN``, ``Infinity`` and ``-Infinity`` are refused (write a
    missing value as ``null`` and handle it in the model), and so is a number too large for a
    64-bit float (it would become infinite). Lists of numbers become float64 arrays.
"""

from __future__ import annotations

import csv
import io
import json
import math
import zipfile
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray

from chainyard.errors import ConfigError

__all__ = ["read_data_file"]

_BOMS = {
    b"\xef\xbb\xbf": "UTF-8",
    b"\xff\xfe": "UTF-16",
    b"\xfe\xff": "UTF-16",
}


def _fail(path: Path, problem: str) -> ConfigError:
    return ConfigError(f"model.data: {path}: {problem}")


def _utf8_text(path: Path, raw: bytes) -> str:
    """The file's text, or a ConfigError naming the BOM or the first byte that is not UTF-8."""
    for bom, name in _BOMS.items():
        if raw.startswith(bom):
            raise _fail(
                path,
                f"starts with a {name} byte-order mark; expected UTF-8 text without one "
                "(save it as plain UTF-8)",
            )
    try:
        return raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = raw.count(b"\n", 0, exc.start) + 1
        raise _fail(
            path,
            f"is not UTF-8 text (byte 0x{raw[exc.start]:02x} at line {line}); expected UTF-8 "
            "(save it as UTF-8)",
        ) from None


def _number(text: str) -> float | None:
    """The cell as a float, or None when it is not written as a number."""
    try:
        return float(text)
    except ValueError:
        return None


def _read_csv(path: Path) -> dict[str, NDArray[Any]]:
    text = _utf8_text(path, path.read_bytes())
    if "\x00" in text:
        raise _fail(path, "holds NUL bytes; expected CSV text")
    try:
        reader = csv.reader(io.StringIO(text, newline=""), strict=True)
        rows: list[tuple[int, list[str]]] = []
        for row in reader:
            if row:
                rows.append((reader.line_num, row))
    except csv.Error as exc:
        raise _fail(path, f"not valid CSV at line {reader.line_num}: {exc}") from None
    if not rows:
        raise _fail(path, "is empty (a header row is required)")
    (_, header), body = rows[0], rows[1:]
    names = [name.strip() for name in header]
    for j, name in enumerate(names):
        if not name:
            raise _fail(path, f"column {j + 1} of the header has no name; every column needs one")
        if names.index(name) != j:
            raise _fail(
                path,
                f"column name {name!r} appears twice (columns {names.index(name) + 1} and "
                f"{j + 1}); column names must be unique",
            )
    if not body:
        raise _fail(path, "has a header but no data rows")
    for line, row in body:
        if len(row) != len(names):
            raise _fail(
                path,
                f"line {line} has {len(row)} fields; the header has {len(names)} "
                f"({', '.join(names)})",
            )
    columns: dict[str, NDArray[Any]] = {}
    for j, name in enumerate(names):
        cells = [row[j].strip() for _, row in body]
        values = [_number(c) for c in cells]
        if all(v is None for v in values):
            columns[name] = np.array(cells, dtype=str)  # a label column
            continue
        for (line, _), cell, v in zip(body, cells, values, strict=True):
            if v is None or not math.isfinite(v):
                shown = "an empty cell" if not cell else repr(cell)
                raise _fail(
                    path,
                    f"column {name!r}, line {line}: {shown} is not a finite number; a column "
                    "with numbers must hold a number in every cell (no missing values; a label "
                    "column holds no numbers)",
                )
        columns[name] = np.array(values, dtype=np.float64)
    return columns


def _read_npz(path: Path) -> dict[str, NDArray[Any]]:
    if not zipfile.is_zipfile(path):
        raise _fail(path, "is not an .npz archive (expected numpy.savez output)")
    out: dict[str, NDArray[Any]] = {}
    with np.load(path, allow_pickle=False) as npz:
        if not npz.files:
            raise _fail(path, "holds no arrays")
        for key in npz.files:
            try:
                out[key] = npz[key]
            except ValueError as exc:
                if "allow_pickle" in str(exc) or "Object arrays" in str(exc):
                    raise _fail(
                        path,
                        f"array {key!r} holds Python objects (dtype object); only arrays of "
                        "numbers, bools or strings are read (objects would need pickle)",
                    ) from None
                raise _fail(path, f"array {key!r} cannot be read: {exc}") from None
    return out


def _constant_line(text: str, token: str) -> int:
    """Line of the first ``token`` outside a JSON string (1 if not found)."""
    in_string = escaped = False
    line = 1
    for k, ch in enumerate(text):
        if ch == "\n":
            line += 1
        if in_string:
            if escaped:
                escaped = False
            elif ch == "\\":
                escaped = True
            elif ch == '"':
                in_string = False
        elif ch == '"':
            in_string = True
        elif text.startswith(token, k):
            return line
    return 1


def _read_json(path: Path) -> Any:
    text = _utf8_text(path, path.read_bytes())

    def refuse(token: str) -> Any:
        at = token if token != "-Infinity" else "Infinity"
        raise _fail(
            path,
            f"{token} at line {_constant_line(text, at)} is not valid JSON (RFC 8259 has no "
            "NaN or Infinity); write a missing value as null and handle it in the model",
        )

    def finite(token: str) -> float:
        value = float(token)
        if not math.isfinite(value):
            raise _fail(
                path,
                f"number {token} at line {_constant_line(text, token)} is too large for a "
                "64-bit float",
            )
        return value

    try:
        doc = json.loads(text, parse_constant=refuse, parse_float=finite)
    except json.JSONDecodeError as exc:
        raise _fail(path, f"not valid JSON at line {exc.lineno}: {exc.msg}") from None
    return _jsonify_arrays(doc)


def _jsonify_arrays(value: Any) -> Any:
    if isinstance(value, dict):
        return {k: _jsonify_arrays(v) for k, v in value.items()}
    if (
        isinstance(value, list)
        and value
        and all(isinstance(v, int | float) and not isinstance(v, bool) for v in value)
    ):
        return np.asarray(value, dtype=np.float64)
    return value


def read_data_file(path: Path) -> Any:
    """Read one data file by its suffix (rules: see the module docstring).

    CSV: a dict of column name -> 1-D array (float64 for numeric columns, str for label
    columns). NPZ: a dict of name -> array (no pickle). JSON: the parsed document, with
    lists of numbers turned into float64 arrays.

    Raises
    ------
    ConfigError
        Naming ``model.data``, the file and what is wrong.
    """
    suffix = path.suffix.lower()
    readers = {".csv": _read_csv, ".npz": _read_npz, ".json": _read_json}
    reader = readers.get(suffix)
    if reader is None:
        raise ConfigError(
            f"model.data: {path.name}: unsupported file type {suffix!r}; allowed: .csv, .npz, "
            ".json, or set model.data_loader"
        )
    try:
        return reader(path)
    except ConfigError:
        raise
    except OSError as exc:
        raise _fail(path, f"cannot read ({exc.strerror or exc})") from None
    except Exception as exc:
        text = " ".join(str(exc).split())
        raise _fail(path, f"cannot read: {type(exc).__name__}: {text}") from None

"""Checks of a store's metadata as read from disk (untrusted: it may be damaged or crafted).

Every check raises :class:`~chainyard.errors.StoreError` (exit status 4) with one line naming
the file and the field and what is allowed; sizes declared by the metadata are checked against
:mod:`chainyard.limits` before anything is allocated. Nothing here decodes chunks or executes
code: JSON only.
"""

from __future__ import annotations

import json
import math
import zipfile
import zlib
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import zarr

from chainyard import limits
from chainyard.errors import StoreError
from chainyard.store.layout import ACCEPTED, COMMIT_FILE, DRAWS, POSITION, START

if TYPE_CHECKING:  # pragma: no cover
    from chainyard.store.zarr_store import Store

__all__ = [
    "ArrayInfo",
    "check_array",
    "check_attrs",
    "check_commit",
    "metadata_bytes",
    "one_line",
    "parse_json",
    "read_json",
    "validate_store",
]


def parse_json(data: bytes, where: str) -> Any:
    """``data`` (the bytes of the metadata file ``where``) as JSON; its size is checked first."""
    limits.check("metadata_bytes", len(data), where)
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise StoreError(
            f"{where}: is not UTF-8 text (byte {exc.start}); the store is damaged"
        ) from None
    try:
        return json.loads(text)
    except ValueError as exc:
        raise StoreError(f"{where}: is not valid JSON ({exc}); the store is damaged") from None
    except RecursionError:  # e.g. 200,000 nested lists: no record of ours nests so deep
        raise StoreError(f"{where}: its JSON nests too deeply; the store is damaged") from None


def _is_int(value: Any) -> bool:
    return isinstance(value, int) and not isinstance(value, bool)


def _bad(where: str, field: str, value: Any, allowed: str) -> StoreError:
    shown = repr(value)
    if len(shown) > 60:
        shown = shown[:57] + "..."
    return StoreError(f"{where}: {field} is {shown}; expected {allowed}; the store is damaged")


def _names(where: str, field: str, value: Any, *, empty: bool) -> list[str]:
    if (
        not isinstance(value, list)
        or not all(isinstance(v, str) and v for v in value)
        or len(set(value)) != len(value)
        or (not empty and not value)
    ):
        allowed = "a list of distinct non-empty names" + ("" if empty else " (at least one)")
        raise _bad(where, field, value, allowed)
    return value


def check_attrs(attrs: dict[str, Any], where: str) -> None:
    """The chainyard attributes of ``zarr.json`` (format already checked by the caller)."""
    _names(where, "attribute param_names", attrs.get("param_names"), empty=False)
    _names(where, "attribute blob_names", attrs.get("blob_names", []), empty=True)
    walkers = attrs.get("walkers")
    if not _is_int(walkers) or walkers < 1:
        raise _bad(where, "attribute walkers", walkers, "a whole number >= 1")
    replica = attrs.get("replica")
    if not _is_int(replica) or replica < 0:
        raise _bad(where, "attribute replica", replica, "a whole number >= 0")
    if not isinstance(attrs.get("config"), dict):
        raise _bad(where, "attribute config", attrs.get("config"), "a mapping (the run config)")
    for key in ("identity", "derived", "provenance", "created_by"):
        if key in attrs and attrs[key] is not None and not isinstance(attrs[key], dict):
            raise _bad(where, f"attribute {key}", attrs[key], "a mapping")
    identity = attrs.get("identity")
    if isinstance(identity, dict):  # the sources it names are read by provenance and plots
        for key in ("model_source", "data", "data_loader", "initial_positions"):
            value = identity.get(key)
            if value is not None and not isinstance(value, dict):
                raise _bad(where, f"attribute identity.{key}", value, "a mapping or null")
        extra = identity.get("extra_sources")
        if extra is not None and not (
            isinstance(extra, list) and all(isinstance(e, dict) for e in extra)
        ):
            raise _bad(where, "attribute identity.extra_sources", extra, "a list of mappings")


def check_commit(record: Any, where: str) -> None:
    """A commit record's fields and their types (the capacity bound is checked by the store)."""
    if not isinstance(record, dict):
        raise StoreError(
            f"{where}: holds a JSON {type(record).__name__}, not a commit record (a mapping); "
            "the store is damaged"
        )
    steps = record.get("steps_done", None)
    if "steps_done" not in record:
        raise StoreError(f"{where}: field steps_done is missing; the store is damaged")
    if not _is_int(steps) or steps < 0:
        raise _bad(where, "steps_done", steps, "a whole number >= 0")
    if "random_state" not in record:
        raise StoreError(f"{where}: field random_state is missing; the store is damaged")
    state = record["random_state"]
    if state is not None and not isinstance(state, dict):  # null: a derived store
        raise _bad(where, "random_state", state, "a mapping (sampler RNG state) or null")
    sums = record.get("checksums")
    if not isinstance(sums, dict) or not all(
        isinstance(v, list) and all(isinstance(s, str) for s in v) for v in sums.values()
    ):
        if "checksums" not in record:
            raise StoreError(f"{where}: field checksums is missing; the store is damaged")
        raise _bad(where, "checksums", sums, "a mapping of array name to a list of checksums")
    segments = record.get("segments", [])
    if not isinstance(segments, list) or not all(isinstance(s, dict) for s in segments):
        raise _bad(where, "segments", segments, "a list of mappings")
    integrity = record.get("integrity")
    if integrity is not None and not isinstance(integrity, dict):
        raise _bad(where, "integrity", integrity, "a mapping")
    if "format_version" in record and record["format_version"] != 1:
        raise _bad(where, "format_version", record["format_version"], "1")


class ArrayInfo:
    """What the store needs from one array's validated ``zarr.json``.

    Attributes
    ----------
    meta : dict
        The parsed metadata.
    shape, chunks : tuple of int
        Declared shape and chunk shape.
    """

    def __init__(self, meta: dict[str, Any], shape: tuple[int, ...], chunks: tuple[int, ...]):
        self.meta = meta
        self.shape = shape
        self.chunks = chunks


def check_array(
    meta: Any,
    where: str,
    *,
    dtype: str,
    tail: tuple[int, ...],
    per_step: bool,
) -> ArrayInfo:
    """One array's parsed ``zarr.json`` against what the store's attributes declare.

    Parameters
    ----------
    meta : Any
        The parsed JSON.
    where : str
        The file, for messages (``STORE/draws/position/zarr.json``).
    dtype : {"float64", "bool"}
        The data type the layout prescribes.
    tail : tuple of int
        The shape after the steps axis (per-step arrays) or the whole shape (start arrays),
        from the attributes: ``(walkers, params)`` or ``(walkers,)``.
    per_step : bool
        True for ``draws/*`` (shape ``(capacity, *tail)``, chunks ``(chunk_steps, *tail)``).
    """
    if not isinstance(meta, dict):
        raise StoreError(f"{where}: holds a JSON {type(meta).__name__}, not array metadata")
    if meta.get("zarr_format") != 3 or meta.get("node_type") != "array":
        raise _bad(
            where,
            "zarr_format/node_type",
            [meta.get("zarr_format"), meta.get("node_type")],
            "[3, 'array']",
        )
    shape = meta.get("shape")
    if not isinstance(shape, list) or not all(_is_int(n) and n >= 0 for n in shape):
        raise _bad(where, "shape", shape, "a list of whole numbers >= 0")
    want = f"[capacity, {', '.join(map(str, tail))}]" if per_step else str(list(tail))
    if (tuple(shape[1:]) if per_step else tuple(shape)) != tail or len(shape) != len(tail) + int(
        per_step
    ):
        raise _bad(where, "shape", shape, f"{want} (from the store's attributes)")
    if meta.get("data_type") != dtype:
        raise _bad(where, "data_type", meta.get("data_type"), repr(dtype))
    grid = meta.get("chunk_grid")
    conf = grid.get("configuration") if isinstance(grid, dict) else None
    chunks = conf.get("chunk_shape") if isinstance(conf, dict) else None
    if (
        not isinstance(grid, dict)
        or grid.get("name") != "regular"
        or not isinstance(chunks, list)
        or not all(_is_int(n) and n >= 1 for n in chunks)
        or len(chunks) != len(shape)
    ):
        raise _bad(where, "chunk_grid", grid, "a regular grid with one chunk size >= 1 per axis")
    if tuple(chunks[1:] if per_step else chunks) != (tail if per_step else tuple(shape)):
        raise _bad(
            where,
            "chunk_shape",
            chunks,
            f"{'[chunk_steps, ' if per_step else '['}"
            f"{', '.join(map(str, tail))}] (one chunk spans every walker)",
        )
    size = math.prod(chunks) * np.dtype(dtype).itemsize
    limits.check("chunk_bytes", size, f"{where} (chunk_shape {chunks})")
    if not isinstance(meta.get("codecs"), list) or not meta["codecs"]:
        raise _bad(where, "codecs", meta.get("codecs"), "a non-empty list of codecs")
    from chainyard.store.decode import codec_problem

    problem = codec_problem(meta["codecs"])
    if problem:
        raise StoreError(f"{where}: field codecs: {problem}; the store is damaged")
    return ArrayInfo(meta, tuple(shape), tuple(chunks))


def one_line(exc: BaseException) -> str:
    """``exc`` as a short single line for a message."""
    text = " ".join(str(exc).split()) or type(exc).__name__
    return text if len(text) <= 160 else text[:157] + "..."


def read_json(file: Path) -> Any:
    """A metadata file parsed as JSON, its size checked against the limit before reading."""
    try:
        limits.check("metadata_bytes", file.stat().st_size, str(file))
        data = file.read_bytes()
    except OSError as exc:
        raise StoreError(f"{file}: cannot be read ({exc.strerror or exc})") from None
    return parse_json(data, str(file))


def validate_store(store: Store) -> None:
    """Check a just-opened store's attributes, commit record and array metadata; open arrays.

    Fills ``store._info`` (validated metadata) and ``store._nodes`` (opened zarr arrays).
    """
    check_attrs(store._attrs, f"{store.path}/zarr.json")
    walkers, params = int(store._attrs["walkers"]), len(store._attrs["param_names"])
    nodes = {f"{DRAWS}/{n}": True for n in store.array_names()}
    nodes.update({f"{START}/{n}": False for n in store.start_names()})
    capacity: dict[str, int] = {}
    for node, per_step in nodes.items():
        key = f"{node}/zarr.json"
        raw = metadata_bytes(store, key)
        if raw is None:
            raise StoreError(f"{store.path}/{key}: array {node} is missing; the store is damaged")
        name = node.split("/", 1)[1]
        info = check_array(
            parse_json(raw, f"{store.path}/{key}"),
            f"{store.path}/{key}",
            dtype="bool" if per_step and name == ACCEPTED else "float64",
            tail=(walkers, params) if name == POSITION else (walkers,),
            per_step=per_step,
        )
        store._info[node] = info
        if per_step:
            capacity[node] = info.shape[0]
            steps = store._info[f"{DRAWS}/{POSITION}"].chunks[0]
            if info.chunks[0] != steps or info.shape[0] != capacity[f"{DRAWS}/{POSITION}"]:
                raise StoreError(
                    f"{store.path}/{key}: shape {list(info.shape)} / chunk_shape "
                    f"{list(info.chunks)} disagree with {DRAWS}/{POSITION} (capacity "
                    f"{capacity[f'{DRAWS}/{POSITION}']}, {steps} steps per chunk); "
                    "the store is damaged"
                )
    cap = capacity[f"{DRAWS}/{POSITION}"]
    if store._commit["steps_done"] > cap:
        raise StoreError(
            f"{store.path}/{COMMIT_FILE}: steps_done is {store._commit['steps_done']}, beyond "
            f"the {cap} rows the arrays hold; the store is damaged"
        )
    for node in nodes:
        try:
            arr = store._group[node]
            if not isinstance(arr, zarr.Array):
                raise TypeError(f"{node} is a {type(arr).__name__}")
        except Exception as exc:
            raise StoreError(
                f"{store.path}/{node}/zarr.json: cannot be opened as a zarr array "
                f"({one_line(exc)}); the store is damaged"
            ) from None
        store._nodes[node] = arr


def metadata_bytes(store: Store, key: str) -> bytes | None:
    """Bytes of the metadata file ``key`` (None if missing); its size is checked first."""
    where = f"{store.path}/{key}"
    try:
        if store._archive is not None:
            try:
                info = store._archive.getinfo(key)
            except KeyError:
                return None
            limits.check("metadata_bytes", info.file_size, where)
            return store._archive.read(key)
        file = store.path / key
        if not file.is_file():
            return None
        limits.check("metadata_bytes", file.stat().st_size, where)
        return file.read_bytes()
    except (OSError, zipfile.BadZipFile, zlib.error, EOFError) as exc:
        raise StoreError(f"{where}: cannot be read ({one_line(exc)})") from None

"""Writing an export: netCDF-4 (``.nc``), zarr (``.zarr``) or CSV (``.csv``), safely.

Formats, chosen by the output's extension:

* ``.nc``: the DataTree of :func:`chainyard.analysis.export.build_datatree` in netCDF-4 through
  h5netcdf (HDF5 via h5py's wheels: no netCDF-C library to install);
* ``.zarr``: the same tree as a zarr store (a folder);
  both written one replica at a time (memory: one replica's exported draws);
* ``.csv``: one row per draw, columns ``chain, draw, replica, walker, step``, the parameters
  (config order), ``log_prob``, ``accepted`` (0/1) and the blobs; rows ordered by replica,
  then draw, then walker; floats written with 17 significant digits (exact round trip).
  Written a few stored chunks at a time, so memory does not grow with the run.

Output safety: the output is written to a temporary sibling ``.NAME.export-PID.tmp`` and
renamed into place, so it is either absent, the previous file or the new complete one. A
chainyard store, a path inside one, an input (store or record), the current folder or a
folder holding an input are refused, always. Anything else already there is refused unless
``force``; even then only a regular file (``.nc``, ``.csv``) or a zarr export written by
chainyard (``.zarr``) is replaced.
"""

from __future__ import annotations

import json
import os
import shutil
import warnings
from collections.abc import Sequence
from contextlib import suppress
from pathlib import Path

import numpy as np

from chainyard.analysis.export import iter_replica_trees, read_blocks
from chainyard.analysis.export_room import check_room, clean_export_leftovers, netcdf_bytes
from chainyard.analysis.outputs import _enclosing_store, _swap_in, store_kind
from chainyard.analysis.selection import Selection
from chainyard.errors import ConfigError, StoreError
from chainyard.store import Store
from chainyard.store.faults import settle_zarr_writes

__all__ = ["FORMATS", "check_export_path", "export_run", "write_csv", "write_netcdf", "write_zarr"]

#: the DataTree's groups
GROUPS = ("posterior", "sample_stats")

#: extension -> what is written
FORMATS = {".nc": "netCDF-4 (h5netcdf)", ".zarr": "zarr", ".csv": "CSV"}


def export_format(out: Path) -> str:
    """The output format from the extension (``.nc``, ``.zarr``, ``.csv``); exit 2 else."""
    ext = out.suffix.lower()
    if ext not in FORMATS:
        allowed = ", ".join(f"{e} ({w})" for e, w in FORMATS.items())
        raise ConfigError(f"{out}: -o must end in {allowed}; got {ext or 'no extension'!r}")
    return ext


def _refuse(out: Path, why: str) -> StoreError:
    return StoreError(f"{out}: refusing to write the export there: {why}")


def _is_zarr_export(path: Path) -> bool:
    """True for a zarr folder whose root attributes say chainyard exported it."""
    meta = path / "zarr.json"
    try:
        if path.is_symlink() or meta.stat().st_size > 1 << 26:
            return False
        attrs = json.loads(meta.read_bytes()).get("attributes", {})
    except (OSError, ValueError, AttributeError):
        return False
    return isinstance(attrs, dict) and attrs.get("creation_library") == "chainyard"


def check_export_path(out: Path, inputs: Sequence[Path], *, force: bool) -> tuple[Path, str]:
    """The resolved output path and format, after refusing what must not be replaced.

    Raises
    ------
    ConfigError
        Unknown extension (exit 2).
    StoreError
        A store, a path inside one, an input, the current folder, a folder holding an input,
        or an existing path without ``force`` (or one ``force`` may not replace) (exit 4).
    """
    ext = export_format(out)
    target = out.resolve()
    cwd = Path.cwd().resolve()
    if store_kind(target) in ("sampled", "derived"):
        raise _refuse(out, "it is a chainyard store")
    home = _enclosing_store(target)
    if home is not None:
        raise _refuse(out, f"it is inside the chainyard store {home}")
    if target == cwd or target in cwd.parents:
        raise _refuse(out, "it is (or holds) the current folder")
    for item in inputs:
        src = item.resolve()
        if target == src:
            raise _refuse(out, f"it is an input ({item})")
        if target in src.parents:
            raise _refuse(out, f"it holds an input ({item})")
    if not os.path.lexists(target):
        return target, ext
    if not force:
        raise _refuse(out, "it exists (pass --force to replace an earlier export)")
    if ext == ".zarr":
        if not _is_zarr_export(target):
            raise _refuse(out, "it exists and is not a zarr export written by chainyard")
    elif target.is_symlink() or not target.is_file():
        raise _refuse(out, "it exists and is not a regular file")
    return target, ext


def write_csv(stores: Sequence[Store], selection: Selection, path: Path) -> int:
    """Write the CSV described in the module docstring; returns the number of rows."""
    stores = sorted(stores, key=lambda s: s.replica)
    first = stores[0]
    names, blobs, walkers = first.param_names, first.blob_names, first.walkers
    header = ["chain", "draw", "replica", "walker", "step", *names, "log_prob", "accepted"]
    header += list(blobs)
    fmt = ["%d"] * 5 + ["%.17g"] * (len(names) + 1) + ["%d"] + ["%.17g"] * len(blobs)
    steps = selection.steps()
    rows = 0
    with open(path, "w", newline="") as f:
        f.write(",".join(header) + "\n")
        for r, s in enumerate(stores):
            for a, b, block in read_blocks(s, selection):
                k = b - a
                table = np.empty((k * walkers, len(header)))
                draw = np.repeat(np.arange(a, b), walkers)
                walker = np.tile(np.arange(walkers), k)
                table[:, 0] = r * walkers + walker
                table[:, 1] = draw
                table[:, 2] = s.replica
                table[:, 3] = walker
                table[:, 4] = steps[draw]
                table[:, 5 : 5 + len(names)] = block["position"].reshape(k * walkers, -1)
                col = 5 + len(names)
                table[:, col] = block["log_prob"].reshape(-1)
                table[:, col + 1] = block["accepted"].reshape(-1)
                for i, name in enumerate(blobs):
                    table[:, col + 2 + i] = block[f"blob/{name}"].reshape(-1)
                np.savetxt(f, table, fmt=fmt, delimiter=",")
                rows += table.shape[0]
    return rows


def write_netcdf(stores: Sequence[Store], selection: Selection, path: Path) -> None:
    """The DataTree as netCDF-4 (h5netcdf), written one replica at a time.

    The first replica is written by xarray with ``chain`` unlimited; each further one is
    appended by growing ``chain`` and writing its slice of every variable along it.
    """
    import h5netcdf

    trees = iter_replica_trees(stores, selection)
    first = next(trees)
    first.to_netcdf(path, engine="h5netcdf", unlimited_dims={f"/{g}": ["chain"] for g in GROUPS})
    start = first["posterior"].sizes["chain"]
    with h5netcdf.File(path, "a") as f:
        for tree in trees:
            stop = start + tree["posterior"].sizes["chain"]
            for name in GROUPS:
                group = f[name]
                group.resize_dimension("chain", stop)
                for var_name, var in tree[name].to_dataset().variables.items():
                    if var.dims and var.dims[0] == "chain":
                        values = var.values
                        if values.dtype == bool:  # stored as int8 with dtype="bool" (xarray)
                            values = values.astype(np.int8)
                        group.variables[var_name][start:stop, ...] = values
            start = stop


def write_zarr(stores: Sequence[Store], selection: Selection, path: Path) -> None:
    """The DataTree as a zarr store, one replica at a time (appended along ``chain``).

    Metadata are consolidated at the end, so readers (arviz-base, xarray) open the tree
    without a fallback; zarr warns that consolidated metadata are outside the v3 spec, and
    that warning is silenced here.
    """
    import zarr

    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message="Consolidated metadata")
        trees = iter_replica_trees(stores, selection)
        next(trees).to_zarr(path, mode="w-", consolidated=False)
        for tree in trees:
            for name in GROUPS:
                tree[name].to_dataset().to_zarr(
                    path, group=name, mode="a", append_dim="chain", consolidated=False
                )
        zarr.consolidate_metadata(str(path))


def _remove(path: Path) -> None:
    with suppress(OSError):
        if path.is_dir() and not path.is_symlink():
            shutil.rmtree(path)
        else:
            path.unlink(missing_ok=True)


def export_run(
    stores: Sequence[Store],
    selection: Selection,
    out: str | Path,
    *,
    inputs: Sequence[Path] = (),
    force: bool = False,
) -> str:
    """Write the selected draws of a run's replica stores to ``out`` (format by extension).

    Parameters
    ----------
    stores : sequence of Store
        Replica stores of one run (checked by :func:`~chainyard.analysis.export.same_run`).
    selection : Selection
        Rows to export (:func:`~chainyard.analysis.export.choose_selection`).
    out : str or Path
        ``.nc``, ``.zarr`` or ``.csv``.
    inputs : sequence of Path
        Further inputs never to overwrite (decision records); the stores are added.
    force : bool
        Replace an earlier export at ``out``.

    Returns
    -------
    str
        What was written, in one line.
    """
    out = Path(out)
    protected = [Path(s.path) for s in stores] + list(inputs)
    target, ext = check_export_path(out, protected, force=force)
    target.parent.mkdir(parents=True, exist_ok=True)
    clean_export_leftovers(target)
    tmp = target.parent / f".{target.name}.export-{os.getpid()}.tmp"
    _remove(tmp)
    chains = stores[0].walkers * len(stores)
    if ext == ".nc":  # HDF5 crashes on a failed write: refuse what cannot fit beforehand
        first = stores[0]
        size = netcdf_bytes(chains, selection.draws, len(first.param_names), len(first.blob_names))
        check_room(out, target.parent, size)
    try:
        if ext == ".csv":
            rows = write_csv(stores, selection, tmp)
            what = f"{rows:,} rows"
        else:
            (write_netcdf if ext == ".nc" else write_zarr)(stores, selection, tmp)
            what = f"{chains} chains x {selection.draws:,} draws"
        if ext == ".zarr" and os.path.lexists(target):
            _swap_in(tmp, target)
        else:
            os.replace(tmp, target)
    except BaseException:
        if ext == ".zarr":
            settle_zarr_writes()  # a write still running would recreate the removed folder
        _remove(tmp)
        raise
    return f"{out}: {what} ({FORMATS[ext]}; {selection.description})"

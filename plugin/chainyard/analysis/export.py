"""A run's draws in ArviZ's data model (an xarray DataTree), and which draws are exported.

Layout (what :func:`to_datatree` returns and ``chainyard export`` writes)
------------------------------------------------------------------------
* ``posterior``: one variable per parameter (config order), then one per blob, each of dims
  ``(chain, draw)``. **chain = replica x walker**: the replicas sorted by index, and within
  each its walkers, so chain ``c`` is walker ``c % walkers`` of the ``c // walkers``-th
  replica given; the non-index coordinates ``replica (chain)`` and ``walker (chain)`` name
  both. ``draw`` counts the exported draws from 0; the coordinate ``step (draw)`` is the
  sampler step after which the draw was taken (1 = the first step of the sampled run), so
  burn-in and thinning stay visible. Blobs (extra values the model returns) are derived
  quantities of each draw and sit in ``posterior`` beside the parameters, as ArviZ places
  generated quantities; the group's attributes ``parameter_names`` and ``blob_names`` list both
  (comma-separated).
* ``sample_stats``: ``lp`` (log-probability of the draw, ArviZ's name) and ``accepted``
  (bool: whether the walker's proposal was accepted at that step), same dims.
* Variable attributes ``units`` and ``long_name`` (CF conventions) from the config's
  ``unit`` and ``label``; ``reference_value`` where the config gives one.
* Root attributes: ``chainyard_provenance`` (a JSON string: the provenance record of every
  replica store and the selection), ``chainyard_selection`` (one line), and the usual
  ``created_at`` / ``creation_library`` keys.

Memory: :func:`to_datatree` holds the exported draws once (``chains x draws x (params +
blobs + 2) x 8`` bytes); the file writers (:mod:`.export_files`) hold one replica's at a time
(:func:`iter_replica_trees`). Stores are read a few stored chunks at a time.
"""

from __future__ import annotations

import json
from collections.abc import Iterator, Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
from numpy.typing import NDArray

from chainyard.analysis.records import input_identity
from chainyard.analysis.selection import Selection, row_map, same_run
from chainyard.store import Store

if TYPE_CHECKING:  # pragma: no cover
    import xarray as xr

__all__ = [
    "build_datatree",
    "iter_replica_trees",
    "provenance_attrs",
    "read_blocks",
    "replica_groups",
    "to_datatree",
]

#: bytes of stored rows read at once (whole stored chunks, at least one)
READ_BYTES = 1 << 23


def read_blocks(
    store: Store, selection: Selection
) -> Iterator[tuple[int, int, dict[str, NDArray[Any]]]]:
    """Kept rows of every per-step array, a few stored chunks at a time.

    Yields
    ------
    (a, b, rows)
        Kept draws ``[a, b)`` and ``rows[name]`` of shape ``(b - a, walkers[, params])`` for
        every name in ``store.array_names()``.
    """
    row_bytes = 8 * store.walkers * (len(store.param_names) + len(store.blob_names) + 2)
    per = max(1, (READ_BYTES // max(row_bytes, 1)) // selection.factor)
    per = max(per, store.chunk_steps // selection.factor, 1)
    for a in range(0, selection.draws, per):
        b = min(selection.draws, a + per)
        lo = selection.discard + a * selection.factor
        hi = selection.discard + (b - 1) * selection.factor + 1
        yield a, b, {n: store.read_rows(n, lo, hi, selection.factor) for n in store.array_names()}


def _variable_attrs(store: Store) -> dict[str, dict[str, Any]]:
    """CF-style ``units``/``long_name`` (and ``reference_value``) per parameter."""
    out: dict[str, dict[str, Any]] = {}
    for p in store.config.parameters:
        attrs: dict[str, Any] = {}
        if p.unit:
            attrs["units"] = p.unit
        if p.label:
            attrs["long_name"] = p.label
        ref = getattr(p, "reference_value", None)
        if ref is not None:
            attrs["reference_value"] = float(ref)
        out[p.name] = attrs
    return out


def provenance_attrs(stores: Sequence[Store], selection: Selection) -> dict[str, Any]:
    """Root attributes: the provenance of every replica and the selection (JSON string)."""
    from chainyard.facts import chainyard_version, utc_now
    from chainyard.provenance.record import provenance_record

    body = {
        "format": "chainyard.export",
        "format_version": 1,
        "selection": {
            "description": selection.description,
            "discard": selection.discard,
            "factor": selection.factor,
            "draws": selection.draws,
            "first_step": selection.first_step,
            "step_stride": selection.step_stride,
            "records": [input_identity(r) for r in selection.records],
        },
        "chains": "chain = replica x walker (replicas sorted by index, walkers within each)",
        "stores": [provenance_record(s) for s in stores],
    }
    return {
        "created_at": utc_now(),
        "creation_library": "chainyard",
        "creation_library_version": chainyard_version(),
        "creation_library_language": "Python",
        "sampler": str((stores[0].attrs.get("identity") or {}).get("sampler_kind", "")),
        "chainyard_selection": selection.description,
        "chainyard_provenance": json.dumps(body, sort_keys=True, allow_nan=False),
    }


def to_datatree(
    stores: Sequence[Store | str | Path] | Store | str | Path,
    *,
    raw: bool = False,
    burn_in_record: str | Path | None = None,
    thinning_record: str | Path | None = None,
) -> xr.DataTree:
    """A run's draws as an ArviZ DataTree, choosing the draws as ``chainyard export`` does.

    Parameters
    ----------
    stores : Store, path, or a sequence of them
        The replica stores of one run: derived stores (after burn-in/thinning) as they are,
        or sampled stores with ``burn_in_record`` (and ``thinning_record``) or ``raw``.
    raw : bool
        Every committed draw of sampled stores (burn-in included).
    burn_in_record, thinning_record : str or Path, optional
        Decision records to apply to sampled stores.

    Returns
    -------
    xarray.DataTree
        Layout in the module docstring.

    Raises
    ------
    StoreError
        Stores of different runs or stages, or a sampled store without records or ``raw``.
    """
    from chainyard.analysis.selection import choose_selection

    items = [stores] if isinstance(stores, Store | str | Path) else list(stores)
    opened = [s if isinstance(s, Store) else Store.open(s) for s in items]
    selection = choose_selection(
        opened, raw=raw, burn_in_record=burn_in_record, thinning_record=thinning_record
    )
    return build_datatree(opened, selection)


def _prepared(
    stores: Sequence[Store] | Store, selection: Selection | None
) -> tuple[list[Store], Selection]:
    """The stores sorted by replica (checked to be one run) and the selection to use."""
    stores = sorted([stores] if isinstance(stores, Store) else list(stores), key=_replica)
    same_run(stores)
    if selection is None:
        offset, stride = row_map(stores[0].attrs)
        n = min(s.steps_done for s in stores)
        selection = Selection(0, 1, n, 1 + offset, stride, "the stores' committed draws")
    return stores, selection


def replica_groups(store: Store, index: int, selection: Selection) -> dict[str, xr.Dataset]:
    """The ``posterior`` and ``sample_stats`` datasets of one replica (its chains only).

    ``index`` is the replica's position among the exported ones: its walkers are chains
    ``index * walkers ...``. Memory: this replica's exported draws once.
    """
    import xarray as xr

    names, blobs, walkers, n = store.param_names, store.blob_names, store.walkers, selection.draws
    post = {v: np.empty((walkers, n)) for v in (*names, *blobs)}
    lp = np.empty((walkers, n))
    acc = np.empty((walkers, n), dtype=bool)
    for a, b, block in read_blocks(store, selection):
        for j, name in enumerate(names):
            post[name][:, a:b] = block["position"][:, :, j].T
        for name in blobs:
            post[name][:, a:b] = block[f"blob/{name}"].T
        lp[:, a:b] = block["log_prob"].T
        acc[:, a:b] = block["accepted"].T
    coords = {
        "chain": index * walkers + np.arange(walkers),
        "draw": np.arange(n),
        "replica": ("chain", np.full(walkers, store.replica)),
        "walker": ("chain", np.arange(walkers)),
        "step": ("draw", selection.steps()),
    }
    var_attrs = _variable_attrs(store)
    dims = ("chain", "draw")
    posterior = xr.Dataset(
        {v: (dims, post[v], var_attrs.get(v, {})) for v in (*names, *blobs)},
        coords=coords,
        # comma-separated: netCDF turns a one-element list attribute into a plain string
        attrs={"blob_names": ",".join(blobs), "parameter_names": ",".join(names)},
    )
    stats = xr.Dataset(
        {
            "lp": (dims, lp, {"long_name": "log-probability of the draw"}),
            "accepted": (dims, acc, {"long_name": "the walker's proposal was accepted"}),
        },
        coords=coords,
    )
    return {"posterior": posterior, "sample_stats": stats}


def iter_replica_trees(
    stores: Sequence[Store] | Store, selection: Selection | None = None
) -> Iterator[xr.DataTree]:
    """One DataTree per replica (sorted by index), the first with the root attributes.

    Writing them one after the other along ``chain`` gives :func:`build_datatree`'s tree while
    holding one replica's draws at a time.
    """
    import xarray as xr

    stores, selection = _prepared(stores, selection)
    for index, store in enumerate(stores):
        tree = xr.DataTree.from_dict(replica_groups(store, index, selection))
        if index == 0:
            tree.attrs = provenance_attrs(stores, selection)
        yield tree


def build_datatree(
    stores: Sequence[Store] | Store, selection: Selection | None = None
) -> xr.DataTree:
    """The DataTree of ``stores`` under ``selection`` (layout: module docstring), in memory.

    Parameters
    ----------
    stores : Store or sequence of Store
        Replica stores of one run at one stage (checked with :func:`same_run`).
    selection : Selection, optional
        Rows to export (:func:`~chainyard.analysis.selection.choose_selection`); default every
        committed row of the shortest replica as it is stored.

    Returns
    -------
    xarray.DataTree
        Groups ``posterior`` and ``sample_stats``; opens with ``arviz_base``.
    """
    import xarray as xr

    parts = list(iter_replica_trees(stores, selection))
    groups = {
        g: xr.concat([t[g].to_dataset() for t in parts], dim="chain", data_vars="all")
        for g in ("posterior", "sample_stats")
    }
    tree = xr.DataTree.from_dict(groups)
    tree.attrs = dict(parts[0].attrs)
    return tree


def _replica(store: Store) -> int:
    return store.replica

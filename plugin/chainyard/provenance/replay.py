"""Replay: rerun recorded steps from the recorded config, model and seed; compare bitwise.

The model and data are located (``--sources DIR``, else the sources inside a pack, else the
directory the config was read from), their content hashes are compared with the recorded
identity *before* the model is imported, and the sampler is driven exactly as the run loop
drives it. Every replayed row is compared byte for byte with the stored one; the first
difference names the step, array and walker.

* ``steps=N``: the first N steps from the recorded seed (initial positions included). For a
  derived (trimmed/thinned) store, the stored rows that fall inside those N source steps
  are compared.
* ``segment=K``: segment K of the history only, starting from the stored row before it and
  the RNG state recorded when the segment began; this checks that a resume or extension was
  exact.

Where the model and data come from is :mod:`chainyard.provenance.replay_sources`; the
consent to run code that came with a store, :mod:`chainyard.provenance.replay_consent`;
the result and the row comparison, :mod:`chainyard.provenance.replay_compare`.
"""

from __future__ import annotations

import tempfile
from contextlib import ExitStack
from pathlib import Path
from typing import Any

import numpy as np

from chainyard.errors import ConfigError, VerificationError
from chainyard.provenance.replay_compare import ReplayResult, _difference, _row_map, _StoredRows
from chainyard.provenance.replay_consent import (
    RUN_PACK_CODE,
    pack_code,
    require_code_consent,
    require_pack_consent,
)
from chainyard.provenance.replay_sources import _materialise_pack_sources, replay_base
from chainyard.store import Store
from chainyard.store.integrity import INTEGRITY_KEY

__all__ = ["RUN_PACK_CODE", "ReplayResult", "pack_code", "replay", "require_pack_consent"]


def _config(store: Store, base: Path, steps: int) -> Any:
    from chainyard.config import parse_config, steps_key

    data = store.attrs["config"]
    data["sampler"][steps_key(data["sampler"])] = max(1, steps)
    try:
        return parse_config(data, base_dir=base, source=f"{store.path} (stored config)")
    except ConfigError as exc:
        raise VerificationError(f"{store.path}: cannot replay: {exc}") from None


def _check_inputs(store: Store, config: Any, base: Path) -> None:
    """Refuse before importing anything if model or data differ from the recorded ones."""
    from chainyard.engine.drivers import driver_kind
    from chainyard.engine.identity import describe_differences, run_identity

    diffs = describe_differences(
        store.attrs.get("identity") or {}, run_identity(config, store.replica, driver_kind(config))
    )
    if diffs:
        raise VerificationError(
            f"{store.path}: cannot replay: model or data no longer match the recorded ones "
            f"(looked in {base}): {'; '.join(diffs)}"
        )


def _start(store: Store, config: Any, model: Any, a: int, segment: int | None) -> tuple[Any, ...]:
    """Positions, log-prob, blobs and RNG state before step ``a`` (and any start difference)."""
    from chainyard.engine.drivers import engine_blob_names, initial_random_state
    from chainyard.engine.initial import initial_state

    names = store.blob_names
    if a == 0:
        pos, lp, blobs, _ = initial_state(config, model, store.replica)
        extra = len(engine_blob_names(config))
        if extra:  # the engine's blobs start at zero (nothing drawn yet)
            blobs = np.column_stack([blobs, np.zeros((len(pos), extra))])
        rng = initial_random_state(config, store.replica)
        stored = store.start_state()
        diff = _difference("start/position", -1, stored["position"], pos) or _difference(
            "start/log_prob", -1, stored["log_prob"], lp
        )
        return pos, lp, blobs, rng, diff
    states = (store.commit_record.get(INTEGRITY_KEY) or {}).get("segment_states") or []
    rng = states[segment] if segment is not None and segment < len(states) else None
    if rng is None:
        raise VerificationError(
            f"{store.path}: segment {segment} has no recorded starting RNG state (written "
            f"before chainyard recorded it); replay from the start instead (--replay {a + 1})"
        )
    pos = store.read_rows("position", a - 1, a)[0]
    lp = store.read_rows("log_prob", a - 1, a)[0]
    cols = [store.read_rows(f"blob/{b}", a - 1, a)[0] for b in names]
    blobs = np.column_stack(cols) if cols else np.empty((store.walkers, 0))
    return pos, lp, blobs, rng, None


def _run(store: Store, base: Path, a: int, b: int, segment: int | None) -> ReplayResult:
    from chainyard.engine.drivers import make_driver
    from chainyard.model import load_model

    config = _config(store, base, b)
    _check_inputs(store, config, base)
    try:
        model = load_model(config)
    except ConfigError as exc:
        raise exc.located(config.source) from None
    pos, lp, blobs, rng, diff = _start(store, config, model, a, segment)
    result = ReplayResult(str(store.path), a, b, 0, diff, str(base))
    if diff is not None:
        return result
    rows = _row_map(store)
    wanted = {int(s): j for j, s in enumerate(rows) if a <= s < b}
    if not wanted:
        raise VerificationError(
            f"{store.path}: replaying steps {a}-{b - 1} covers none of this store's rows (its "
            f"first row is source step {int(rows[0]) if rows.size else 0}); replay more steps"
        )
    try:
        driver = make_driver(config, model, pos, lp, blobs, rng, step=a)
    except ValueError as exc:
        raise VerificationError(f"{store.path}: cannot replay: {exc}") from None
    blob_names = store.blob_names
    stored = _StoredRows(store)
    for step, out in enumerate(driver.steps(b - a), start=a):
        j = wanted.get(step)
        if j is None:
            continue
        replayed = {"position": out.position, "log_prob": out.log_prob, "accepted": out.accepted}
        for k, name in enumerate(blob_names):
            replayed[f"blob/{name}"] = out.blobs[:, k]
        for name, values in replayed.items():
            diff = _difference(f"draws/{name}", step, stored.row(name, j), values)
            if diff is not None:
                result.first_difference = diff
                return result
        result.compared += 1
    return result


def replay(
    target: str | Path | Store,
    steps: int | None = None,
    *,
    segment: int | None = None,
    sources: str | Path | None = None,
    run_pack_code: bool = False,
) -> ReplayResult:
    """Rerun recorded steps of a store and compare them bitwise with the stored draws.

    Parameters
    ----------
    target : str, Path or Store
        A store, derived store or packed store.
    steps : int, optional
        Replay the first ``steps`` source steps (default: all committed steps).
    segment : int, optional
        Replay only this segment of the history (sampled stores).
    sources : str or Path, optional
        Directory the recorded model/data paths are resolved against (default: the pack's
        copies, else the directory of the original config).
    run_pack_code : bool
        Allow running code that came with the store: a pack's (packed or unpacked) model
        code and config, or model files that resolve inside the store's own folder. Other
        model files of a plain store (the user's own, at its recorded absolute
        ``config_dir``) run either way.

    Raises
    ------
    ConfigError
        If the code to run came with the store or pack and ``run_pack_code`` is false, or
        the recorded ``config_dir`` is relative and no ``sources`` is given (nothing is
        imported).
    VerificationError
        If the model or data no longer match their recorded hashes, or nothing can be
        compared. A replay that runs but differs is returned, not raised.
    """
    store = target if isinstance(target, Store) else Store.open(target)
    require_code_consent(store, run_pack_code, sources)
    attrs = store.attrs
    if store.steps_done == 0:
        raise VerificationError(f"{store.path}: no committed steps to replay")
    total = int(_row_map(store)[-1]) + 1
    if segment is not None:
        segs = store.commit_record.get("segments") or []
        if attrs.get("derived") or not 0 <= segment < len(segs):
            raise VerificationError(
                f"{store.path}: no segment {segment} (the history has {len(segs)} segment(s); "
                "derived stores have none: use --replay N)"
            )
        a, b = int(segs[segment]["from_step"]), int(segs[segment]["to_step"])
    else:
        a, b = 0, min(int(steps), total) if steps is not None else total
        if b < 1:
            raise VerificationError("--replay needs at least 1 step")
    with ExitStack() as stack:
        base = replay_base(store, sources)
        if base is None:  # a pack: its own copies of the model and data
            tmp = Path(stack.enter_context(tempfile.TemporaryDirectory(prefix="chainyard-")))
            base = _materialise_pack_sources(store, tmp)
            assert base is not None
        return _run(store, base, a, b, segment)

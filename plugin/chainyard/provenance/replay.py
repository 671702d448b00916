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
"""

from __future__ import annotations

import json
import tempfile
from contextlib import ExitStack
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray

from chainyard.errors import ConfigError, UnsafeInputError, VerificationError
from chainyard.store import Store
from chainyard.store.files import iter_stored, read_stored, stored_size
from chainyard.store.integrity import INTEGRITY_KEY

__all__ = ["RUN_PACK_CODE", "ReplayResult", "pack_code", "replay", "require_pack_consent"]

PACK_MANIFEST = "pack/manifest.json"


@dataclass
class ReplayResult:
    """Outcome of a replay.

    Attributes
    ----------
    subject : str
        The store replayed.
    from_step, to_step : int
        Source steps ``[from_step, to_step)`` that were rerun.
    compared : int
        Stored rows compared (fewer than the steps for a thinned store).
    first_difference : dict or None
        ``{"step", "array", "walker", "stored", "replayed"}`` of the first differing value.
    sources : str
        Where the model and data were read from.
    """

    subject: str
    from_step: int
    to_step: int
    compared: int
    first_difference: dict[str, Any] | None
    sources: str

    @property
    def ok(self) -> bool:
        """True when every compared row is bitwise identical."""
        return self.first_difference is None

    def line(self) -> str:
        """One line summarising the result."""
        span = f"steps {self.from_step}-{self.to_step - 1}"
        if self.ok:
            return (
                f"{self.subject}: replayed {span} from {self.sources}: {self.compared:,} stored "
                "row(s) bitwise identical"
            )
        d = self.first_difference or {}
        return (
            f"{self.subject}: replay of {span} differs first at step {d['step']} in "
            f"{d['array']} (walker {d['walker']}: stored {d['stored']!r}, replayed "
            f"{d['replayed']!r})"
        )

    def to_dict(self) -> dict[str, Any]:
        """JSON form."""
        return {
            "subject": self.subject,
            "from_step": self.from_step,
            "to_step": self.to_step,
            "compared": self.compared,
            "ok": self.ok,
            "first_difference": self.first_difference,
            "sources": self.sources,
        }


#: the command-line option that allows replaying a pack (running its code)
RUN_PACK_CODE = "--run-pack-code"


def _pack_manifest(store: Store) -> dict[str, Any] | None:
    """The pack manifest a packed or unpacked store holds (None for a plain store)."""
    raw = read_stored(store, PACK_MANIFEST, "metadata_bytes")
    if raw is None:
        return None
    try:
        manifest = json.loads(raw)
    except ValueError:
        manifest = None
    if not isinstance(manifest, dict):
        raise UnsafeInputError(f"{store.path}: {PACK_MANIFEST} is not a JSON object")
    return manifest


def pack_code(store: Store) -> str | None:
    """What replaying ``store`` would import and run if it is a pack (packed or unpacked);
    None for a store that is not a pack (its config's model files are the user's own)."""
    manifest = _pack_manifest(store)
    if manifest is None:
        return None
    model = (store.attrs.get("config") or {}).get("model") or {}
    code = [f"model {model.get('log_prob')}"]
    if model.get("data_loader"):
        code.append(f"data loader {model.get('data_loader')}")
    files = [
        str(s.get("member"))
        for s in manifest.get("sources") or []
        if isinstance(s, dict) and str(s.get("member", "")).endswith(".py")
    ]
    return ", ".join(code) + (f" (bundled {', '.join(files)})" if files else "")


def require_pack_consent(store: Store, allowed: bool) -> None:
    """Refuse to replay a pack unless running its code was allowed explicitly.

    Raises
    ------
    ConfigError
        (exit 2) naming what would run and the option that allows it.
    """
    if allowed:
        return
    what = pack_code(store)
    if what is not None:
        raise ConfigError(
            f"{store.path}: replaying this pack would import and run code that came with it: "
            f"{what}; add {RUN_PACK_CODE} if you trust where the pack came from"
        )


def _code_references(data: Any) -> list[tuple[str, str]]:
    """(field, reference) of every function a stored config names (model, loader, kernel)."""
    if not isinstance(data, dict):
        return []
    model = data.get("model") if isinstance(data.get("model"), dict) else {}
    sampler = data.get("sampler") if isinstance(data.get("sampler"), dict) else {}
    refs = [
        ("model.log_prob", model.get("log_prob")),
        ("model.data_loader", model.get("data_loader")),
        ("sampler.kernel", sampler.get("kernel")),
    ]
    return [(f, r) for f, r in refs if isinstance(r, str) and r]


def _is_file_reference(ref: str) -> bool:
    module = ref.rpartition(":")[0]
    return module.endswith(".py") or "/" in module or "\\" in module


def replay_base(store: Store, sources: str | Path | None) -> Path | None:
    """The folder a plain store's recorded model paths resolve against (None for a pack).

    Raises
    ------
    ConfigError
        (exit 2) if the recorded ``config_dir`` is not an absolute path and no ``sources``
        folder was given: recorded paths are never resolved against the current folder.
    """
    if sources is not None:
        return Path(sources).resolve()
    if _pack_manifest(store) is not None:
        return None
    recorded = store.attrs.get("config_dir")
    if not isinstance(recorded, str) or not Path(recorded).is_absolute():
        raise ConfigError(
            f"{store.path}: the recorded config_dir {recorded!r} is not an absolute path; "
            "recorded paths are never resolved against the current folder: give --sources DIR "
            "(the folder holding the model and data)"
        )
    return Path(recorded)


def stored_code(store: Store, base: Path | None) -> list[str]:
    """The functions a replay would import from files inside the store's own folder."""
    if base is None:
        return []
    inside = Path(store.path).resolve()
    found = []
    for field, ref in _code_references(store.attrs.get("config")):
        if not _is_file_reference(ref):
            continue
        module = Path(ref.rpartition(":")[0])
        path = (module if module.is_absolute() else base / module).resolve()
        if path.is_relative_to(inside):
            found.append(f"{field} {ref}")
    return found


def require_code_consent(store: Store, allowed: bool, sources: str | Path | None = None) -> None:
    """Refuse to replay code that came with a store or pack unless explicitly allowed.

    A pack's code, and model files that resolve inside the store's own folder, came with the
    store (from whoever made it), not from the user's sources.

    Raises
    ------
    ConfigError
        (exit 2) naming what would run and the option that allows it; also if the recorded
        ``config_dir`` is relative and no ``sources`` was given (see :func:`replay_base`).
    """
    require_pack_consent(store, allowed)
    base = replay_base(store, sources)
    if allowed:
        return
    code = stored_code(store, base)
    if code:
        raise ConfigError(
            f"{store.path}: replaying this store would import and run code stored inside it: "
            f"{', '.join(code)}; add {RUN_PACK_CODE} if you trust where the store came from"
        )


def _materialise_pack_sources(store: Store, into: Path) -> Path | None:
    """Write a pack's model/data files at their recorded relative paths below ``into``
    (copied in blocks; paths that would leave ``into`` are skipped)."""
    manifest = _pack_manifest(store)
    if manifest is None:
        return None
    sources = [
        s
        for s in manifest.get("sources") or []
        if isinstance(s, dict) and isinstance(s.get("path"), str) and s["path"]
    ]
    ups = [Path(s["path"]).parts.count("..") for s in sources]
    depth = min(max(ups, default=0), 16)
    base = into.joinpath(*(["d"] * depth)) if depth else into
    base.mkdir(parents=True, exist_ok=True)
    root = into.resolve()
    for s in sources:
        member = str(s.get("member"))
        if Path(s["path"]).is_absolute() or stored_size(store, member) is None:
            continue
        dest = (base / s["path"]).resolve()
        if not dest.is_relative_to(root):
            continue
        dest.parent.mkdir(parents=True, exist_ok=True)
        with open(dest, "wb") as f:
            for block in iter_stored(store, member):
                f.write(block)
    return base


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


class _StoredRows:
    """Stored rows one at a time, decoding each chunk once."""

    def __init__(self, store: Store) -> None:
        self.store = store
        self.cache: dict[str, tuple[int, NDArray[Any]]] = {}

    def row(self, name: str, j: int) -> NDArray[Any]:
        size = self.store.chunk_steps
        c = j // size
        hit = self.cache.get(name)
        if hit is None or hit[0] != c:
            lo = c * size
            hit = (c, self.store.read_rows(name, lo, min(lo + size, self.store.steps_done)))
            self.cache[name] = hit
        return hit[1][j - c * size]


def _row_map(store: Store) -> NDArray[np.int64]:
    """Source step of every stored row (identity for a sampled store)."""
    steps = np.arange(store.steps_done, dtype=np.int64)
    block = store.attrs.get("derived")
    while block:
        steps = int(block["discard"]) + steps * int(block["factor"])
        block = block.get("parent")
    return steps


def _difference(
    name: str, step: int, stored: NDArray[Any], replayed: NDArray[Any]
) -> dict[str, Any] | None:
    a = np.ascontiguousarray(stored)
    b = np.ascontiguousarray(np.asarray(replayed, dtype=a.dtype).reshape(a.shape))
    if a.tobytes() == b.tobytes():
        return None
    per_walker = a.view(np.uint8).reshape(a.shape[0], -1) != b.view(np.uint8).reshape(
        b.shape[0], -1
    )
    w = int(np.argmax(per_walker.any(axis=1)))
    return {
        "step": step,
        "array": name,
        "walker": w,
        "stored": a[w].tolist(),
        "replayed": b[w].tolist(),
    }


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

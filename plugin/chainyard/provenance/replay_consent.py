"""Consent before a replay runs code that came with a store rather than from the user.

A pack's model code (packed or unpacked), and model files that resolve inside the store's
own folder, came from whoever made the store; replaying them needs :data:`RUN_PACK_CODE`
(``run_pack_code=True``). The refusal names what would run, before anything is imported.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

from chainyard.errors import ConfigError
from chainyard.provenance.replay_sources import _pack_manifest, replay_base
from chainyard.store import Store

__all__ = [
    "RUN_PACK_CODE",
    "pack_code",
    "require_code_consent",
    "require_pack_consent",
    "stored_code",
]

#: the command-line option that allows replaying a pack (running its code)
RUN_PACK_CODE = "--run-pack-code"


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

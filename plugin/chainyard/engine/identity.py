"""What determines a run's draws, and how two such descriptions differ.

The identity is compared whenever an existing store is resumed or extended: anything that
would change the draws (model code, data, seed, replica, walkers, moves, parameters and their
initialisation, blobs) must match, or the run is refused. ``steps`` is deliberately absent:
extending a finished run is exact.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

from chainyard.config import RunConfig
from chainyard.model import file_sha256, resolve_source

__all__ = ["IDENTITY_LABELS", "describe_differences", "run_identity"]

IDENTITY_LABELS = {
    "model_source": "model file content",
    "extra_sources": "model.extra_sources content",
    "data": "data file content",
    "data_loader": "data loader file content",
    "initial_positions": "initial positions file content",
    "log_prob": "model.log_prob function",
    "vectorized": "model.vectorized",
    "seed": "seed",
    "replica": "replica",
    "walkers": "sampler.walkers",
    "moves": "sampler.moves",
    "blobs": "sampler.blobs",
    "init_retries": "sampler.init_retries",
    "parameters": "parameters (names, init or bounds)",
    "sampler_kind": "sampler kind",
    "sampler_settings": "sampler settings",
    "kernel_source": "sampler.kernel file content",
}


def _file_record(path: Path | None, written: str | None) -> dict[str, Any] | None:
    if written is None:
        return None
    if path is None or not path.is_file():
        return {"path": written, "sha256": None}
    return {"path": written, "sha256": file_sha256(path)}


def run_identity(config: RunConfig, replica: int, sampler_kind: str) -> dict[str, Any]:
    """Everything that determines the draws of one replica, with file content hashes."""
    norm = config.normalised()
    model = config.model
    source = resolve_source(model.log_prob, config.base_dir)
    loader_src = resolve_source(model.data_loader, config.base_dir) if model.data_loader else None
    out: dict[str, Any] = {
        "model_source": _file_record(source, model.log_prob.rpartition(":")[0]),
        "extra_sources": [_file_record(config.resolve(s), s) for s in model.extra_sources],
        "data": _file_record(config.resolve(model.data) if model.data else None, model.data),
        "data_loader": _file_record(loader_src, model.data_loader),
        "initial_positions": _file_record(
            config.resolve(config.sampler.initial_positions)
            if config.sampler.initial_positions
            else None,
            config.sampler.initial_positions,
        ),
        "log_prob": model.log_prob.rpartition(":")[2],
        "vectorized": model.vectorized,
        "seed": config.seed,
        "replica": replica,
        "walkers": config.sampler.walkers,
        "moves": norm["sampler"].get("moves", []),
        "blobs": list(config.sampler.blobs),
        "init_retries": config.sampler.init_retries,
        "parameters": [
            {"name": p["name"], "init": p["init"], "bounds": p["bounds"]}
            for p in norm["parameters"]
        ],
        "sampler_kind": sampler_kind,
    }
    if config.sampler.kind != "ensemble":  # every setting but the run length shapes the draws
        out["sampler_settings"] = {
            k: v for k, v in norm["sampler"].items() if k not in ("steps", "draws")
        }
    kernel = getattr(config.sampler, "kernel", None)
    if kernel:  # a user kernel's code shapes the draws like the model's
        module = kernel.rpartition(":")[0]
        record = _file_record(resolve_source(kernel, config.base_dir), module)
        out["kernel_source"] = record
        if module.endswith(".py") or "/" in module or "\\" in module:
            # packed, recorded and verified with the other source files
            out["extra_sources"] = [*out["extra_sources"], record]
    return out


def _short(value: Any) -> str:
    if isinstance(value, dict) and "sha256" in value:
        digest = value["sha256"]
        return f"sha256 {digest[:12]}" if digest else "missing"
    text = repr(value)
    return text if len(text) <= 48 else text[:45] + "..."


def describe_differences(stored: dict[str, Any], current: dict[str, Any]) -> list[str]:
    """One phrase per differing identity field, e.g. ``"seed (7 -> 8)"``; empty if equal."""
    out = []
    for key in sorted(
        set(stored) | set(current),
        key=lambda k: list(IDENTITY_LABELS).index(k) if k in IDENTITY_LABELS else 99,
    ):
        a, b = stored.get(key), current.get(key)
        if a != b:
            label = IDENTITY_LABELS.get(key, key)
            if isinstance(a, list) and isinstance(b, list) and key == "extra_sources":
                out.append(label)
            else:
                out.append(f"{label} ({_short(a)} -> {_short(b)})")
    return out

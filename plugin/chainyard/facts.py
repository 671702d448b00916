"""Facts recorded with every result: software versions, host, git state, timestamps.

The lowest layer of the package (imports nothing from chainyard), so that the store, the
engine and everything above may record them. :mod:`chainyard.provenance` re-exports them.
"""

from __future__ import annotations

import datetime as _dt
import functools
import os
import socket
import sys
from pathlib import Path
from typing import Any

__all__ = ["chainyard_version", "git_state", "host_record", "software_versions", "utc_now"]

_PACKAGES = (
    "chainyard",
    "numpy",
    "emcee",
    "zarr",
    "numcodecs",
    "pcodec",
    "pydantic",
    "prov",
    "matplotlib",
    "scipy",
    "snakemake",
)


def utc_now() -> str:
    """Current UTC time, ISO 8601 with seconds."""
    return _dt.datetime.now(_dt.UTC).isoformat(timespec="seconds").replace("+00:00", "Z")


@functools.cache
def chainyard_version() -> str:
    """This package's installed version ("0+unknown" when it is not installed)."""
    from importlib import metadata

    try:
        return metadata.version("chainyard")
    except metadata.PackageNotFoundError:
        return "0+unknown"


def software_versions() -> dict[str, str | None]:
    """Python and package versions (None for a package that is not installed)."""
    return dict(_software_versions())


@functools.cache
def _software_versions() -> dict[str, str | None]:
    # read once per process: package metadata parsing costs ~15 ms a call (and importing
    # importlib.metadata, platform and subprocess is left to the processes that record)
    import platform
    from importlib import metadata

    out: dict[str, str | None] = {"python": platform.python_version()}
    for name in _PACKAGES:
        try:
            out[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            out[name] = None
    return out


def host_record() -> dict[str, Any]:
    """Host name, platform and process id."""
    import platform

    return {
        "host": socket.gethostname(),
        "platform": platform.platform(),
        "machine": platform.machine(),
        "pid": os.getpid(),
        "executable": sys.executable,
    }


def git_state(directory: Path) -> dict[str, Any] | None:
    """Commit and dirty flag of the git work tree holding ``directory`` (None if not in one)."""
    import subprocess

    try:
        commit = subprocess.run(
            ["git", "-C", str(directory), "rev-parse", "HEAD"],
            capture_output=True,
            text=True,
            timeout=10,
            check=True,
        ).stdout.strip()
        dirty = subprocess.run(
            ["git", "-C", str(directory), "status", "--porcelain", "--untracked-files=no"],
            capture_output=True,
            text=True,
            timeout=10,
            check=True,
        ).stdout.strip()
    except (OSError, subprocess.SubprocessError):
        return None
    return {"commit": commit, "dirty": bool(dirty)}

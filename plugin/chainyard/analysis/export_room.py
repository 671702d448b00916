"""Before an export is written: room for it, and temporary files left by killed exports.

HDF5 (behind ``.nc`` exports) does not survive a write that fails half-way: on a full disk or
past ``ulimit -f`` it printed dozens of lines and crashed the process (exit 139), leaving its
temporary file behind. So a netCDF export is refused beforehand (exit 8, one line) when its
size, known from the selection, exceeds the free space of the output's file system or the
file-size limit. Exports killed mid-write leave ``.NAME.export-PID.tmp``; the next export of
NAME removes those whose process is gone.
"""

from __future__ import annotations

import os
import re
import resource
import shutil
from contextlib import suppress
from pathlib import Path

from chainyard.errors import StorageFaultError

__all__ = ["check_room", "clean_export_leftovers", "netcdf_bytes"]

#: bytes an export file holds besides its arrays (HDF5 headers, coordinates, attributes);
#: measured on small exports (~40 KB), rounded up; common practice, no source
NETCDF_OVERHEAD_BYTES = 1 << 17


def netcdf_bytes(chains: int, draws: int, params: int, blobs: int) -> int:
    """Bytes of an uncompressed netCDF export: float64 draws, log-prob, blobs, int8 accepted,
    plus ``NETCDF_OVERHEAD_BYTES`` (an estimate from above)."""
    values = chains * draws
    return values * (8 * (params + 1 + blobs) + 1) + NETCDF_OVERHEAD_BYTES


def _mb(n: float) -> str:
    return f"{n / 1e6:,.1f} MB"


def check_room(out: Path, folder: Path, needed: int) -> None:
    """Refuse (exit 8) to write ``needed`` bytes where they cannot fit.

    Raises
    ------
    StorageFaultError
        If ``needed`` exceeds the free space of ``folder``'s file system or the process's
        file-size limit (``ulimit -f``).
    """
    soft, _ = resource.getrlimit(resource.RLIMIT_FSIZE)
    if soft != resource.RLIM_INFINITY and needed > soft:
        raise StorageFaultError(
            f"{out}: the export needs about {_mb(needed)} but the file-size limit "
            f"(ulimit -f) is {_mb(soft)}; nothing was written"
        )
    try:
        free = shutil.disk_usage(folder).free
    except OSError:
        return
    if needed > free:
        raise StorageFaultError(
            f"{out}: the export needs about {_mb(needed)} but {folder} has {_mb(free)} free; "
            "nothing was written"
        )


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


def clean_export_leftovers(target: Path) -> list[str]:
    """Remove ``.NAME.export-PID.tmp`` siblings of ``target`` whose process has ended.

    Returns
    -------
    list of str
        The names removed.
    """
    pattern = re.compile(rf"\.{re.escape(target.name)}\.export-(\d+)\.tmp")
    try:
        names = os.listdir(target.parent)
    except OSError:
        return []
    removed = []
    for name in names:
        match = pattern.fullmatch(name)
        if match is None or _alive(int(match.group(1))):
            continue
        path = target.parent / name
        with suppress(OSError):
            if path.is_dir() and not path.is_symlink():
                shutil.rmtree(path)
            else:
                path.unlink()
            removed.append(name)
    return removed

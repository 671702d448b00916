"""A real Dask ``LocalCluster`` with process workers, for the tests (run as a script).

Prints ``ADDRESS tcp://HOST:PORT`` and ``WORKERS PID PID`` (the worker processes' ids) on
standard output, then serves until its standard input closes. Started as a file, not from
standard input: Dask's nannies re-import the main module of the process that spawns them.
"""

from __future__ import annotations

import os
import sys


def main() -> None:
    from distributed import Client, LocalCluster

    workers = int(sys.argv[1]) if len(sys.argv) > 1 else 2
    with (
        LocalCluster(
            n_workers=workers, threads_per_worker=1, processes=True, dashboard_address=None
        ) as cluster,
        Client(cluster) as client,
    ):
        pids = client.run(os.getpid)
        print("ADDRESS", cluster.scheduler_address, flush=True)
        print("WORKERS", *sorted(pids.values()), flush=True)
        sys.stdin.read()  # until the test closes our standard input


if __name__ == "__main__":
    main()

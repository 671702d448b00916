"""``chainyard status``: a live view of a workflow's runs, read from its results folder.

``collect`` finds the runs and replicas, ``replica`` tells a replica's state from committed
data only (commit records, the "run in progress" markers, failure notes and logs; never a
lock) and ``states`` holds the status records and combines replicas into a run;
``failures`` reads why a job failed; ``verdict`` computes the interim verdict from committed
steps; ``render_text`` and ``render_html`` draw the table and the self-refreshing page;
``watch`` runs one view or a refreshing one; ``command`` is the CLI command.
"""

from __future__ import annotations

__all__: list[str] = []

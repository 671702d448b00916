"""Store-level steps: decide burn-in and thinning, derive stores, diagnose, the posterior table.

These functions read stores one parameter column at a time, a few stored chunks per read
(bounded memory: :func:`diagnose` peaks at about three columns), call the pure
functions of :mod:`chainyard.diagnostics` and :mod:`chainyard.decisions`, and write
JSON records that carry a provenance stamp. The workflow rules and the command line are thin
wrappers over them.
"""

from __future__ import annotations

import importlib
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:  # pragma: no cover
    from chainyard.analysis.decide import decide_burn_in, decide_thinning
    from chainyard.analysis.derive import derive_store
    from chainyard.analysis.diagnose import diagnose, diagnose_arrays, format_table
    from chainyard.analysis.records import read_record, store_digest, write_record
    from chainyard.analysis.summary_table import summary_table, write_summary_csv

# Imported on first use (PEP 562): the command line registers `export`, `results-table` and `plot`
# from chainyard.commands.results without paying for scipy and the diagnostics.
_LAZY = {
    "decide_burn_in": "chainyard.analysis.decide",
    "decide_thinning": "chainyard.analysis.decide",
    "derive_store": "chainyard.analysis.derive",
    "diagnose": "chainyard.analysis.diagnose",
    "diagnose_arrays": "chainyard.analysis.diagnose",
    "format_table": "chainyard.analysis.diagnose",
    "read_record": "chainyard.analysis.records",
    "store_digest": "chainyard.analysis.records",
    "write_record": "chainyard.analysis.records",
    "summary_table": "chainyard.analysis.summary_table",
    "write_summary_csv": "chainyard.analysis.summary_table",
}


def __getattr__(name: str) -> Any:
    module = _LAZY.get(name)
    if module is None:
        raise AttributeError(f"module 'chainyard.analysis' has no attribute {name!r}")
    value = getattr(importlib.import_module(module), name)
    globals()[name] = value
    return value


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(_LAZY))


__all__ = [
    "decide_burn_in",
    "decide_thinning",
    "derive_store",
    "diagnose",
    "diagnose_arrays",
    "format_table",
    "read_record",
    "store_digest",
    "summary_table",
    "write_record",
    "write_summary_csv",
]

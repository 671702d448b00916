"""Store-level steps: decide burn-in and thinning, derive stores, diagnose, the posterior table.

These functions read stores one parameter column at a time, a few stored chunks per read
(bounded memory: :func:`diagnose` peaks at about three columns), call the pure
functions of :mod:`chainyard.diagnostics` and :mod:`chainyard.decisions`, and write
JSON records that carry a provenance stamp. The workflow rules and the command line are thin
wrappers over them.
"""

from chainyard.analysis.decide import decide_burn_in, decide_thinning
from chainyard.analysis.derive import derive_store
from chainyard.analysis.diagnose import diagnose, diagnose_arrays, format_table
from chainyard.analysis.records import read_record, store_digest, write_record
from chainyard.analysis.summary_table import summary_table, write_summary_csv

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

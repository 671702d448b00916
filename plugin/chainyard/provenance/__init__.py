"""Provenance: what produced a result, whether it is intact, and how to share it.

This package's top level re-exports the facts recorded with every result (software versions,
host, git state, timestamps) from :mod:`chainyard.facts`, the lowest layer.
The rest lives in submodules (imported on use):

``record``
    the provenance record (format ``chainyard.provenance`` version 1) of a store, derived
    store or JSON record, its completeness check, and :func:`~chainyard.provenance.record.stamp`
    for new outputs;
``verify``
    :func:`~chainyard.provenance.verify.verify` (chunks, counters, seal, provenance chain);
``replay``
    rerunning recorded steps and comparing them bitwise;
``pack``
    single-file archives (``chainyard.pack`` version 1) and unpacking them;
``prov_json``
    W3C PROV-JSON export;
``inspect``
    the human (and JSON) summary of a store.
"""

from __future__ import annotations

from chainyard.facts import git_state, host_record, software_versions, utc_now

__all__ = ["git_state", "host_record", "software_versions", "utc_now"]

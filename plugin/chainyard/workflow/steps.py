"""The work behind each rule, as plain functions (the rule scripts only unpack arguments).

Sampling keeps its resumable store in an undeclared sibling folder
(``RESULTS/RUN/.resumable/replica-R.zarr``) that Snakemake never deletes; the declared output
is a hard-linked copy made when the run is complete (no extra disk; chunk files are replaced,
never modified in place, so later extensions cannot change an existing output).
"""

from __future__ import annotations

import json
import os
import shutil
from collections.abc import Sequence
from pathlib import Path
from typing import Any

from pydantic import TypeAdapter

from chainyard.analysis import (
    decide_burn_in,
    decide_thinning,
    derive_store,
    diagnose,
    format_table,
    read_record,
    write_record,
    write_summary_csv,
)
from chainyard.analysis.replicas import open_replicas
from chainyard.analysis.summary import summarise
from chainyard.config import BurnInSpec, TargetsSpec, ThinningSpec, parse_config
from chainyard.engine import sample
from chainyard.errors import StoreConflictError
from chainyard.store import Store

__all__ = [
    "decide_step",
    "derive_step",
    "diagnose_step",
    "link_tree",
    "plot_step",
    "sample_step",
    "summary_step",
]

BURN_IN_KIND = "chainyard.burn_in_decision"
THINNING_KIND = "chainyard.thinning_decision"
DIAGNOSTICS_KIND = "chainyard.diagnostics"


def link_tree(source: Path, target: Path) -> None:
    """Recreate ``source`` at ``target`` with hard links (copies across file systems)."""
    if target.exists():
        shutil.rmtree(target)
    for root, _dirs, files in os.walk(source):
        rel = Path(root).relative_to(source)
        (target / rel).mkdir(parents=True, exist_ok=True)
        for f in files:
            if f.endswith((".tmp", ".partial", ".lock")):
                continue
            src, dst = Path(root) / f, target / rel / f
            try:
                os.link(src, dst)
            except OSError:
                shutil.copy2(src, dst)


def sample_step(
    settings: str,
    base_dir: str,
    replica: int,
    resumable: str,
    output: str,
    progress_interval: float = 10.0,
    cpus: int = 1,
) -> None:
    """Sample (or resume, or extend) one replica, then publish it at ``output``.

    If the resumable store was made with different settings (the rule reran because the model,
    data or a sampling setting changed), it is discarded and sampling starts over; the log
    says why. With ``cpus`` (the rule's threads) > 1 the model's calls run in up to that many
    worker processes where timing shows it pays (``workers="auto"``).
    """
    config = parse_config(json.loads(settings), base_dir=Path(base_dir), source="run settings")
    pool: dict[str, Any] = {"workers": "auto" if cpus > 1 else 1, "cpus": cpus}
    try:
        sample(
            config, resumable, replica, progress="log", progress_interval=progress_interval, **pool
        )
    except StoreConflictError as exc:
        print(f"chainyard: {exc}; the workflow changed these settings: starting over", flush=True)
        sample(
            config,
            resumable,
            replica,
            restart=True,
            progress="log",
            progress_interval=progress_interval,
            **pool,
        )
    link_tree(Path(resumable), Path(output))


def decide_step(what: str, policy: str, stores: Sequence[str], output: str) -> None:
    """Record the burn-in (``what="burn_in"``) or thinning decision for a run's replicas."""
    replicas = open_replicas(stores)
    spec: Any
    if what == "burn_in":
        spec = TypeAdapter(BurnInSpec).validate_python(json.loads(policy))
        decision = decide_burn_in(replicas, spec)
        kind = BURN_IN_KIND
    else:
        spec = TypeAdapter(ThinningSpec).validate_python(json.loads(policy))
        decision = decide_thinning(replicas, spec)
        kind = THINNING_KIND
    write_record(
        output, kind, {"decision": decision.to_dict(), "policy": json.loads(policy)}, replicas
    )
    print(decision.reason, flush=True)


def derive_step(source: str, record: str, what: str, output: str) -> None:
    """Apply a burn-in or thinning record to one replica store."""
    if what == "burn_in":
        rec = read_record(record, BURN_IN_KIND)
        discard, factor = int(rec["decision"]["steps_discarded"]), 1
    else:
        rec = read_record(record, THINNING_KIND)
        discard, factor = 0, int(rec["decision"]["factor"])
    store = derive_store(
        Store.open(source), output, discard=discard, factor=factor, records=[Path(record)]
    )
    print(
        f"{output}: {store.steps_done:,} steps (discarded {discard:,}, kept every {factor})",
        flush=True,
    )


def diagnose_step(
    stores: Sequence[str], targets: str, run: str, json_out: str, table_out: str
) -> dict[str, Any]:
    """Diagnostics and verdict across replicas: a JSON record and a text table."""
    replicas = open_replicas(stores)
    spec = TargetsSpec.model_validate(json.loads(targets))
    result = diagnose(replicas, spec)
    write_record(json_out, DIAGNOSTICS_KIND, {"run": run, **result}, replicas)
    table = format_table(result, title=f"run {run}")
    Path(table_out).write_text(table + "\n")
    print(table, flush=True)
    return result


def summary_step(stores: Sequence[str], diagnostics: str, output: str) -> None:
    """Posterior summary table (CSV) from the diagnostics record."""
    rec = read_record(diagnostics, DIAGNOSTICS_KIND)
    write_summary_csv(summarise(open_replicas(stores), rec), output)


def plot_step(
    raw: Sequence[str],
    final: Sequence[str],
    burn_in: str,
    diagnostics: str,
    outputs: dict[str, str],
    references: str = "{}",
) -> None:
    """All plots of one run (see :mod:`chainyard.report.plots`).

    ``references`` is the JSON of the current config's reference values (the stored config
    keeps those of sampling time, and changing them must not resample).
    """
    from chainyard.report.plots import (
        acceptance_plot,
        pairs_plot,
        tau_history_plot,
        trace_plot,
    )

    raw_stores = open_replicas(raw)
    final_stores = open_replicas(final)
    cut = int(read_record(burn_in, BURN_IN_KIND)["decision"]["steps_discarded"])
    diag = read_record(diagnostics, DIAGNOSTICS_KIND)
    refs = {str(k): float(v) for k, v in json.loads(references).items()}
    trace_plot(raw_stores, cut, outputs["traces"], references=refs)
    tau_history_plot(final_stores, outputs["tau"], diagnostics=diag)
    pairs_plot(final_stores, outputs["pairs"], references=refs)
    acceptance_plot(raw_stores, outputs["acceptance"], diag)

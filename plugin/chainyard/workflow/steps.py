"""The work behind each rule, as plain functions (the rule scripts only unpack arguments).

Each step imports only what it needs, when it runs (a job is a fresh process: imports are most
of a small job's cost).

Sampling keeps its resumable store in an undeclared sibling folder
(``RESULTS/RUN/.resumable/replica-R.zarr``) that Snakemake never deletes; the declared output
is a hard-linked copy made when the run is complete (no extra disk; chunk files are replaced,
never modified in place, so later extensions cannot change an existing output). Burn-in and
thinning are recorded as a selection over these stores (see
:mod:`chainyard.workflow.selection`), never copied.
"""

from __future__ import annotations

import json
import os
import shutil
from collections.abc import Sequence
from pathlib import Path
from typing import Any

__all__ = [
    "decide_step",
    "diagnose_step",
    "link_tree",
    "overview_step",
    "plot_step",
    "sample_step",
    "sample_to",
    "standalone_step",
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
    A store that holds more steps than ``sampler.steps`` (the config lowered them)
    is published whole; the run's selection then uses the first ``sampler.steps`` steps.
    """
    sample_to(settings, base_dir, replica, resumable, cpus, progress_interval)
    link_tree(Path(resumable), Path(output))


def sample_to(
    settings: str,
    base_dir: str,
    replica: int,
    resumable: str,
    cpus: int = 1,
    progress_interval: float = 10.0,
) -> None:
    """Sample (or resume, or extend) one replica in its resumable store (see
    :func:`sample_step`; also used by a batched sampling job for each member)."""
    from chainyard.workflow.imports import import_emcee_without_kde

    import_emcee_without_kde()
    from chainyard.config import parse_config
    from chainyard.engine import sample
    from chainyard.errors import StoreConflictError

    config = parse_config(json.loads(settings), base_dir=Path(base_dir), source="run settings")
    pool: dict[str, Any] = {"workers": "auto" if cpus > 1 else 1, "cpus": cpus}
    try:
        store = sample(
            config, resumable, replica, progress="log", progress_interval=progress_interval, **pool
        )
    except StoreConflictError as exc:
        # the CLI's "Use --restart" hint is not for a workflow, which starts over by itself
        what = str(exc).split(". Use --restart")[0].rstrip(".")
        print(f"chainyard: {what}; the workflow changed these settings: starting over", flush=True)
        store = sample(
            config,
            resumable,
            replica,
            restart=True,
            progress="log",
            progress_interval=progress_interval,
            **pool,
        )
    requested = config.sampler.steps
    if store.steps_done > requested:
        print(
            f"chainyard: the store holds {store.steps_done:,} steps; the config asks for "
            f"{requested:,}: later steps use the first {requested:,} (recorded in the run's "
            "decisions/selection.json); no stored draws are deleted",
            flush=True,
        )


def decide_step(
    burn_in: str,
    thinning: str,
    steps: int,
    stores: Sequence[str],
    outputs: dict[str, str],
) -> None:
    """Decide burn-in (on the first ``steps`` steps) and thinning (after the cut), and record
    them with the run's selection.

    Parameters
    ----------
    burn_in, thinning : str
        The run's policies (canonical JSON).
    steps : int
        Steps the config asks for; stores holding more are read up to it.
    stores : sequence of str
        The run's replica stores.
    outputs : dict
        Paths of the ``burn_in``, ``thinning`` and ``selection`` records.
    """
    from pydantic import TypeAdapter

    from chainyard.analysis.decide import decide_burn_in, decide_thinning
    from chainyard.analysis.records import write_record
    from chainyard.analysis.replicas import open_replicas
    from chainyard.config import BurnInSpec, ThinningSpec
    from chainyard.errors import StoreError
    from chainyard.workflow.selection import SELECTION_KIND, Selection

    replicas = open_replicas(stores)
    stored = min(s.steps_done for s in replicas)
    if stored < steps:
        raise StoreError(
            f"{replicas[0].path}: {stored:,} steps stored, the config asks for {steps:,}"
        )
    used = Selection(steps, 0, 1).used(replicas)
    burn_spec = TypeAdapter(BurnInSpec).validate_python(json.loads(burn_in))
    burn = decide_burn_in(used, burn_spec)
    cut = int(burn.steps_discarded)
    thin_spec = TypeAdapter(ThinningSpec).validate_python(json.loads(thinning))
    thin = decide_thinning(Selection(steps, cut, 1).kept(replicas), thin_spec)
    selection = Selection(steps, cut, int(thin.factor))
    write_record(
        outputs["burn_in"],
        BURN_IN_KIND,
        {"decision": burn.to_dict(), "policy": json.loads(burn_in), "steps_used": steps},
        replicas,
    )
    write_record(
        outputs["thinning"],
        THINNING_KIND,
        {"decision": thin.to_dict(), "policy": json.loads(thinning), "first_kept": cut},
        replicas,
    )
    kept = selection.kept(replicas)[0].steps_done
    write_record(
        outputs["selection"],
        SELECTION_KIND,
        {**selection.to_dict(), "steps_stored": stored, "kept_per_replica": kept},
        [*replicas, Path(outputs["burn_in"]), Path(outputs["thinning"])],
    )
    print(burn.reason, flush=True)
    print(thin.reason, flush=True)
    more = f" (of {stored:,} stored; the config asks for {steps:,})" if stored > steps else ""
    print(
        f"selection: steps {cut:,} to {steps:,}{more}, every {selection.every}: "
        f"{kept:,} steps per replica",
        flush=True,
    )


def diagnose_step(
    stores: Sequence[str],
    selection: str,
    targets: str,
    run: str,
    outputs: dict[str, str],
) -> dict[str, Any]:
    """Diagnostics and verdict across replicas on the selected steps: a JSON record, a text
    table and the posterior summary (CSV). Returns the record as written."""
    from chainyard.analysis.diagnose import diagnose, format_table
    from chainyard.analysis.records import write_record
    from chainyard.analysis.summary_table import summary_table, write_summary_csv
    from chainyard.config import TargetsSpec
    from chainyard.workflow.selection import read_selection

    sel, replicas = read_selection(selection, stores)
    kept = sel.kept(replicas)
    spec = TargetsSpec.model_validate(json.loads(targets))
    result = diagnose(kept, spec)
    record = write_record(
        outputs["record"],
        DIAGNOSTICS_KIND,
        {"run": run, "selection": sel.to_dict(), **result},
        [*replicas, Path(selection)],
    )
    table = format_table(result, title=f"run {run}")
    Path(outputs["table"]).write_text(table + "\n")
    write_summary_csv(summary_table(kept, diagnostics=record), outputs["summary"])
    print(table, flush=True)
    return record


def plot_step(
    stores: Sequence[str],
    selection: str,
    diagnostics: dict[str, Any],
    outputs: dict[str, str],
    references: str = "{}",
) -> None:
    """All plots of one run (see :mod:`chainyard.report.plots`), given its diagnostics record.

    ``references`` is the JSON of the current config's reference values (the stored config
    keeps those of sampling time, and changing them must not resample).
    """
    from chainyard.report.pairs import pairs_plot
    from chainyard.report.plots import acceptance_plot, tau_history_plot, trace_plot
    from chainyard.workflow.selection import read_selection

    sel, replicas = read_selection(selection, stores)
    used, kept = sel.used(replicas), sel.kept(replicas)
    diag = diagnostics
    refs = {str(k): float(v) for k, v in json.loads(references).items()}
    trace_plot(used, sel.first_kept, outputs["traces"], references=refs)
    tau_history_plot(kept, outputs["tau"], diagnostics=diag)
    pairs_plot(kept, outputs["pairs"], references=refs)
    acceptance_plot(used, outputs["acceptance"], diag)


def standalone_step(store: str, selection: str, output: str) -> None:
    """Write the selected steps of one replica as a standalone store (on request only)."""
    from chainyard.analysis.derive import derive_store
    from chainyard.workflow.selection import read_selection

    sel, (source,) = read_selection(selection, [store])
    out = derive_store(
        source,
        output,
        discard=sel.first_kept,
        factor=sel.every,
        stop=sel.steps_used,
        records=[Path(selection)],
    )
    print(
        f"{output}: {out.steps_done:,} steps (steps {sel.first_kept:,} to {sel.steps_used:,} "
        f"of {source.path}, every {sel.every})",
        flush=True,
    )


def overview_step(
    diagnostics: Sequence[str],
    stores: dict[str, list[str]],
    results: str,
    outputs: dict[str, str],
) -> None:
    """The cross-run overview: ``runs.csv`` and the report's opening page."""
    from chainyard.errors import StoreError
    from chainyard.store import Store
    from chainyard.workflow.overview import MET, overview_row, write_overview_rst, write_runs_csv
    from chainyard.workflow.overview_figure import overview_png

    rows = []
    for path in diagnostics:  # plain JSON: the analysis package (scipy) is not needed here
        rec = json.loads(Path(path).read_text())
        if not isinstance(rec, dict) or rec.get("kind") != DIAGNOSTICS_KIND:
            raise StoreError(f"{path}: expected a {DIAGNOSTICS_KIND!r} record")
        rows.append(overview_row(rec, [Store.open(p) for p in stores[rec["run"]]]))
    ordered = write_runs_csv(rows, outputs["table"])
    figure = overview_png(ordered)
    if outputs.get("figure"):
        Path(outputs["figure"]).write_bytes(figure)
    write_overview_rst(ordered, results, outputs["page"], figure)
    failed = [r["run"] for r in ordered if r["verdict"] != MET]
    print(
        f"{len(ordered)} run(s); targets not met: {', '.join(failed) if failed else 'none'}",
        flush=True,
    )

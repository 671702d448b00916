"""Batched sampling: up to K family members per sampling job (``chainyard.sample_batch``).

Design. A batch is a run of up to K consecutive members of one family in table order
(``FAMILY~N``, N from 0). Its job (rule ``sample_batch``) samples every replica of every
member into the member's own resumable store (``RESULTS/MEMBER/.resumable/replica-R.zarr``,
with the store's usual lock, identity check and resume), then writes one outcome file
``RESULTS/.batches/FAMILY~N.json``: per member and replica, ``ok`` or the member's exit
status and one-line message. A deterministic failure of one member (exit 2-5: config, model,
store, conflict) is recorded there and the batch goes on with the next member; any other
failure (a kill, a storage fault, a bug) fails the whole job, and its retry resumes each
member from its own last commit.

A sampled member's stores are published (hard links, as an unbatched sampling job does) at
``RESULTS/MEMBER/draws/replica-R.zarr``; they are not Snakemake outputs, so Snakemake never
deletes them and plans N/K sampling jobs, not one per member and replica. The member's
analysis job takes the batch's outcome file as input and the member's own sampling settings
as params: it ends with the member's recorded message and exit status if the member failed.
Editing one row reruns that row's batch job, which samples only that member (the others'
complete stores are resumed, found complete, and not sampled); the analyses of the batch's
members rerun (at most K). Rows appended to the table touch only the last batch.
"""

from __future__ import annotations

import json
import sys
from pathlib import Path
from typing import Any

__all__ = ["DETERMINISTIC", "batch_step", "check_member", "member_outcome", "plan_batches"]

#: exit statuses a retry cannot mend: recorded per member, the batch goes on
DETERMINISTIC = frozenset({2, 3, 4, 5})


def plan_batches(runs: dict[str, Any], size: int) -> dict[str, list[str]]:
    """Batches of up to ``size`` members, per family in table order.

    Parameters
    ----------
    runs : dict
        Run name -> :class:`chainyard.workflow.config.RunEntry` (in config/table order).
    size : int
        Members per batch (K >= 2).

    Returns
    -------
    dict
        Batch name ``FAMILY~N`` -> member run names.
    """
    families: dict[str, list[str]] = {}
    for name, entry in runs.items():
        if entry.family is not None:
            families.setdefault(entry.family, []).append(name)
    batches: dict[str, list[str]] = {}
    for family, members in families.items():
        for i in range(0, len(members), size):
            batches[f"{family}~{i // size}"] = members[i : i + size]
    return batches


def batch_step(members: str, output: str, cpus: int = 1) -> None:
    """Sample every replica of every member of one batch; write the outcome file.

    Parameters
    ----------
    members : str
        JSON list of ``{"run", "settings", "base_dir", "replicas": [[index, resumable,
        published], ...]}``.
    output : str
        The batch's outcome file (JSON: ``{"members": {run: {replica: outcome}}}``).
    cpus : int
        The job's CPUs (the model's worker processes where timing shows it pays).
    """
    from chainyard.errors import ChainyardError
    from chainyard.workflow.steps import link_tree, sample_to

    outcomes: dict[str, dict[str, Any]] = {}
    for member in json.loads(members):
        run = member["run"]
        done: dict[str, Any] = {}
        for replica, resumable, _published in member["replicas"]:
            print(f"chainyard: batch: {run} replica {replica}", flush=True)
            try:
                sample_to(member["settings"], member["base_dir"], int(replica), resumable, cpus)
            except ChainyardError as exc:
                if exc.exit_code not in DETERMINISTIC:
                    raise
                line = " ".join(str(exc).split("\n"))
                print(f"chainyard: error: {run}: {line}", file=sys.stderr, flush=True)
                done[str(replica)] = {"exit_code": exc.exit_code, "message": line}
                break  # the member's other replicas would fail the same way
            done[str(replica)] = {"exit_code": 0}
        if not any(o["exit_code"] for o in done.values()):
            for _replica, resumable, published in member["replicas"]:
                link_tree(Path(resumable), Path(published))
        outcomes[run] = done
    failed = sorted(r for r, d in outcomes.items() if any(o["exit_code"] for o in d.values()))
    if failed:
        print(f"chainyard: batch: failed members: {', '.join(failed)}", flush=True)
    tmp = Path(output + ".partial")
    tmp.write_text(json.dumps({"members": outcomes}, sort_keys=True, indent=1))
    tmp.replace(output)


def member_outcome(outcome_file: str, run: str, replica: int) -> tuple[int, str]:
    """A member replica's recorded outcome: (exit status, message); (0, "") when sampled.

    A replica the batch did not reach (an earlier replica of the member failed) gets that
    replica's failure.
    """
    data = json.loads(Path(outcome_file).read_text())
    done = data.get("members", {}).get(run)
    if done is None:
        return 2, f"{run}: not in its batch's outcome file {outcome_file}"
    got = done.get(str(replica))
    if got is None:
        got = next((o for o in done.values() if o.get("exit_code")), None)
        if got is None:
            return 2, f"{run}: replica {replica} not in its batch's outcome file {outcome_file}"
    return int(got["exit_code"]), str(got.get("message", ""))


def check_member(outcome_file: str, run: str, replicas: int) -> None:
    """Raise the member's recorded failure (its one line and exit status), if any."""
    from chainyard.errors import (
        ChainyardError,
        ConfigError,
        ModelError,
        StoreConflictError,
        StoreError,
    )

    kinds: dict[int, type[ChainyardError]] = {
        2: ConfigError,
        3: ModelError,
        4: StoreError,
        5: StoreConflictError,
    }
    for replica in range(replicas):
        code, message = member_outcome(outcome_file, run, replica)
        if code:
            kind = kinds.get(code, StoreError)
            raise kind(f"{run}: sampling failed in its batch ({outcome_file}): {message}")

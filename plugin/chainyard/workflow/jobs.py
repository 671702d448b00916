"""Runs one Snakemake job of the rule library: log redirection, dispatch, clean errors."""

from __future__ import annotations

import contextlib
import json
import sys
from typing import Any

from chainyard.engine.stopping import Interrupted
from chainyard.errors import ChainyardError
from chainyard.workflow.retry import RetryNote

__all__ = ["run_job"]


def _dispatch(sm: Any) -> None:
    from chainyard.workflow import steps  # after the retry check: a refused retry loads nothing

    p = sm.params
    step = p.step
    if step == "sample":
        from chainyard.workflow.config import sampling_settings_of

        # the sampling call of the sample rule: the rule's threads are the model's CPUs
        settings = sampling_settings_of(p)
        steps.sample_step(
            settings, p.base_dir, int(p.replica), p.resumable, sm.output[0], cpus=sm.threads
        )
    elif step == "sample_batch":
        from chainyard.workflow.batches import batch_step

        batch_step(p.members, sm.output[0], cpus=sm.threads)
    elif step == "analyse":
        stores, outputs = json.loads(p.stores), dict(sm.output.items())
        if getattr(p, "sampling", ""):  # a batched member: stop on its recorded failure
            from chainyard.workflow.batches import check_member

            check_member(sm.input[0], p.run, len(stores))
        steps.decide_step(p.burn_in, p.thinning, int(p.steps), stores, outputs)
        record = steps.diagnose_step(stores, outputs["selection"], p.targets, p.run, outputs)
        steps.plot_step(
            stores, outputs["selection"], record, outputs, getattr(p, "references", "{}")
        )
    elif step == "overview":
        steps.overview_step(
            list(sm.input.diagnostics), json.loads(p.stores), p.results, dict(sm.output.items())
        )
    elif step == "standalone":
        steps.standalone_step(sm.input.store, sm.input.selection, sm.output[0])
    else:  # pragma: no cover - the shipped rules set known steps
        raise ValueError(f"unknown chainyard step {step!r}")


def p_step(sm: Any) -> str:
    """The step name of a job (for messages)."""
    return str(getattr(sm.params, "step", "?"))


def _job_fields(sm: Any) -> dict[str, Any]:
    """Run, replica, step and attempt of a job (for its failure file)."""
    wildcards = getattr(sm, "wildcards", None)
    run = getattr(wildcards, "run", None) if wildcards is not None else None
    replica = getattr(wildcards, "replica", None) if wildcards is not None else None
    attempt = sm.resources.get("attempt") if hasattr(sm.resources, "get") else None
    return {
        "run": None if run is None else str(run),
        "replica": None if replica is None else int(replica),
        "step": p_step(sm),
        "attempt": None if attempt is None else int(attempt),
    }


def _report_failure(log: str | None, sm: Any, code: int, reason: str | None) -> None:
    """The failure's one line on the terminal, and its failure file beside the log."""
    from chainyard.workflow.failure import cause_from_log, write_failure

    if reason is None and log:
        reason = cause_from_log(log)
    reason = reason or f"exit status {code}"
    job = _job_fields(sm)
    where = f"run {job['run']}" if job["run"] else "the overview"
    if job["replica"] is not None:
        where += f", replica {job['replica']}"
    if log:
        with contextlib.suppress(OSError):
            write_failure(log, job, code, reason)
    more = f"; log: {log}" if log else ""
    print(
        f"chainyard: error: {job['step']} job failed ({where}): {reason}{more}",
        file=sys.__stderr__,
        flush=True,
    )


def run_job(sm: Any) -> None:
    """Run the job described by Snakemake's ``snakemake`` object.

    Output and errors go to the job's log file (Snakemake does not redirect scripts).
    A user mistake ends the job with its one-line message and exit status, no traceback.
    A failing job also prints its one-line cause to the terminal and writes it beside the
    log (:mod:`chainyard.workflow.failure`); a job that succeeds removes that file.
    """
    log = sm.log[0] if len(sm.log) else None
    reason: str | None = None
    with contextlib.ExitStack() as stack:
        if log:
            f = stack.enter_context(open(log, "w", buffering=1))
            stack.enter_context(contextlib.redirect_stdout(f))
            stack.enter_context(contextlib.redirect_stderr(f))
        note = RetryNote.for_job(sm)
        earlier = note.earlier_failure() if note is not None else None
        try:
            if earlier is not None:
                code = int(earlier["exit_code"])
                print(
                    f"chainyard: error: not retried: attempt {earlier['attempt']} ended with "
                    f"exit status {code}, which a retry cannot mend: {earlier['message']}",
                    file=sys.stderr,
                )
                reason = f"{earlier['message']} (not retried: a retry cannot mend it)"
                sys.stderr.flush()
            else:
                _dispatch(sm)
                code = 0
        except Interrupted as exc:
            code = 128 + exc.signum
            reason = f"stopped by signal {exc.signum} after committing the finished steps"
        except ChainyardError as exc:
            lines = str(exc).splitlines() or [type(exc).__name__]
            for line in lines:
                print(f"chainyard: error: {line}", file=sys.stderr)
            sys.stderr.flush()
            code = exc.exit_code
            more = f" (and {len(lines) - 1} more problem(s) in the log)" if len(lines) > 1 else ""
            reason = lines[0] + more
            if note is not None:
                note.remember(code, str(exc))
        except OSError as exc:  # a storage fault the engine or store did not name
            from chainyard.cli import os_error_exit, report_internal

            found = os_error_exit(exc)
            code = found if found is not None else report_internal(exc, f"job {p_step(sm)}", True)
        except Exception as exc:  # a chainyard bug: the traceback goes to the job's log
            from chainyard.cli import report_internal

            code = report_internal(exc, f"job {p_step(sm)}", True)
        else:
            if code == 0 and note is not None:
                note.clear()
    if code:
        _report_failure(log, sm, code, reason)
        sys.exit(code)
    if log:
        from chainyard.workflow.failure import clear_failure

        clear_failure(log)

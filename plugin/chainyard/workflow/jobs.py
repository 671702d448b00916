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


def run_job(sm: Any) -> None:
    """Run the job described by Snakemake's ``snakemake`` object.

    Output and errors go to the job's log file (Snakemake does not redirect scripts).
    A user mistake ends the job with its one-line message and exit status, no traceback.
    """
    log = sm.log[0] if len(sm.log) else None
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
                sys.stderr.flush()
            else:
                _dispatch(sm)
                code = 0
        except Interrupted as exc:
            code = 128 + exc.signum
        except ChainyardError as exc:
            for line in str(exc).splitlines():
                print(f"chainyard: error: {line}", file=sys.stderr)
            sys.stderr.flush()
            code = exc.exit_code
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
        if log:
            print(f"chainyard: job failed; see {log}", file=sys.__stderr__)
        sys.exit(code)

"""Retries under real snakemake: a failure no retry can mend (a model error, exit 3 in the
README exit table) runs the model once; the retries Snakemake still starts end at once with
one line quoting the first attempt's error. (A killed job that a retry does mend is covered by
test_rules.py::test_retry_resumes_within_one_invocation.)"""

from __future__ import annotations

from pathlib import Path

from tests.workflow.conftest import gauss_run, make_workflow, snakemake

COUNTING_MODEL = """
from pathlib import Path

def log_prob(theta, data):
    with open(Path(__file__).parent / "calls.txt", "a") as f:
        f.write("call\\n")
    raise ValueError("the model is broken")
"""


def test_model_error_runs_once(tmp_path: Path) -> None:
    folder = make_workflow(
        tmp_path, {"gauss": gauss_run(steps=100, replicas=1)}, models={"gauss.py": COUNTING_MODEL}
    )
    res = snakemake(folder, "--cores", "1")
    out = res.stdout + res.stderr
    assert res.returncode != 0
    # Snakemake still starts the 2 configured retries (sample_retries default) ...
    assert out.count("Trying to restart job") == 2
    # ... but the model ran in the first attempt only
    assert (folder / "models" / "calls.txt").read_text().splitlines() == ["call"]
    log = (folder / "results/logs/gauss/sample-replica-0.log").read_text().strip().splitlines()
    assert len(log) == 1
    assert log[0].startswith(
        "chainyard: error: not retried: attempt 1 ended with exit status 3, which a retry "
        "cannot mend: model.log_prob (vectorized) raised ValueError: the model is broken"
    )
    # a new invocation tries again (the cause may have been fixed outside the config)
    res = snakemake(folder, "--cores", "1", "--retries", "0")
    assert res.returncode != 0
    assert (folder / "models" / "calls.txt").read_text().splitlines() == ["call", "call"]

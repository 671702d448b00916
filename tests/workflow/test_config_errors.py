"""Workflow config mistakes under real snakemake: one line per problem, naming the run and the
key and what is allowed there, exit status 2 (README exit table), before any job and before
Snakemake's own schema dump."""

from __future__ import annotations

from pathlib import Path

import yaml

from tests.workflow.conftest import gauss_run, make_workflow, snakemake


def _errors(folder: Path) -> tuple[int, list[str]]:
    res = snakemake(folder, "-n")
    lines = [ln for ln in (res.stdout + res.stderr).splitlines() if ln.strip()]
    return res.returncode, lines


def test_inline_run_typo_is_one_line(tmp_path: Path) -> None:
    """`sampler: {walker: 32}` names runs.NAME.sampler.walker, the likely key and the allowed
    ones; nothing else is printed (no schema dump, no Snakefile traceback)."""
    run = gauss_run()
    run["sampler"]["walker"] = 32
    folder = make_workflow(tmp_path, {"cooling": run})
    code, lines = _errors(folder)
    assert code == 2
    assert lines == [
        "chainyard: error: config: runs.cooling: sampler.walker: unknown key (check the "
        "spelling; see `chainyard schema`); did you mean 'walkers'? allowed: kind, walkers, "
        "steps, moves, blobs, initial_positions, init_retries"
    ]
    assert not (folder / "results").exists()


def test_run_file_and_setting_mistakes_each_one_line(tmp_path: Path) -> None:
    """Problems in several places: a run config file (named with its path), an inline run
    (a wrong type) and a workflow setting; one line each, all reported at once."""
    bad_file = gauss_run()
    bad_file["model"]["log_prob"] = "../models/gauss.py:log_prob"
    bad_file["seeed"] = 3
    inline = gauss_run()
    inline["sampler"]["steps"] = "many"
    folder = make_workflow(
        tmp_path, {"first": "runs/first.yaml", "second": inline}, sample_retry=3
    )
    (folder / "runs").mkdir()
    (folder / "runs" / "first.yaml").write_text(yaml.safe_dump(bad_file))
    code, lines = _errors(folder)
    assert code == 2
    assert lines == [
        "chainyard: error: config: sample_retry: unknown key (check the spelling; "
        "see `chainyard schema`); did you mean 'sample_retries'? allowed: runs, results, "
        "sample_runtime_minutes, sample_mem_mb, sample_retries, "
        "sample_threads, sample_batch"
    ]
    write = {"first": "runs/first.yaml", "second": inline}
    folder = make_workflow(tmp_path / "again", write)
    (folder / "runs").mkdir()
    (folder / "runs" / "first.yaml").write_text(yaml.safe_dump(bad_file))
    code, lines = _errors(folder)
    assert code == 2
    assert len(lines) == 2, lines
    assert lines[0].startswith("chainyard: error: config: runs.first: runs/first.yaml: seeed: "
                               "unknown key (check the spelling; see `chainyard schema`); "
                               "did you mean 'seed'? allowed: model, parameters")
    assert lines[1].startswith("chainyard: error: config: runs.second: sampler.steps = 'many': ")
    assert not any("Traceback" in ln or "Failed validating" in ln for ln in lines)

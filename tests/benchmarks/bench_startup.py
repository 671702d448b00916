"""Start-up cost of the command line, side by side with ``python -c "import numpy"``.

    .venv/bin/python tests/benchmarks/bench_startup.py            # ~1 minute, writes RESULTS.md
    .venv/bin/python tests/benchmarks/bench_startup.py --quick    # prints only
    .venv/bin/python tests/benchmarks/bench_startup.py --compare-with 31844fe  # + that revision

Each command runs in a fresh interpreter; its CPU time (user + system, ``RUSAGE_CHILDREN``)
is measured, rounds interleave the commands (so load on the shared machine hits them alike),
and the median per command is compared with the median of ``import numpy`` from the same
rounds. Target (issue 19): ``chainyard --help`` at most 2x ``import numpy``. The rows for
``inspect`` and ``sample`` (a 2-parameter Gaussian, 16 walkers, 20 steps: nearly all start-up)
are there to show what a job pays before it samples, and which heavy packages it loads.
With ``--compare-with REV`` the same commands of that git revision's ``plugin/`` (extracted
with ``git archive``, put first on ``PYTHONPATH``) run in the same rounds.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import re
import resource
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))

from conftest import write_run  # noqa: E402

#: packages a start-up should not pay for unless the command needs them
HEAVY = ("scipy", "matplotlib", "xarray", "snakemake", "emcee", "zarr", "pydantic", "numpy")

_PROBE = (
    "import atexit, json, sys\n"
    "out = sys.argv[1]\n"
    "atexit.register(lambda: open(out, 'w').write(json.dumps(sorted(sys.modules))))\n"
    "from chainyard.cli import main\n"
    "sys.argv = ['chainyard', *sys.argv[2:]]\n"
    "sys.exit(main())\n"
)


def _cpu(cmd: list[str], cwd: Path, env: dict[str, str] | None = None) -> float:
    """CPU seconds (user + system) of one run of ``cmd``."""
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    subprocess.run(
        cmd, cwd=cwd, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, check=True, env=env
    )
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    return (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)


def _heavy_loaded(args: list[str], cwd: Path) -> list[str]:
    """Which of :data:`HEAVY` a command imports (run once through a probe)."""
    out = cwd / "modules.json"
    subprocess.run(
        [sys.executable, "-c", _PROBE, str(out), *args],
        cwd=cwd,
        stdout=subprocess.DEVNULL,
        stderr=subprocess.DEVNULL,
        check=True,
    )
    loaded = {m.split(".")[0] for m in json.loads(out.read_text())}
    return [m for m in HEAVY if m in loaded]


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--quick", action="store_true", help="3 rounds; print only")
    ap.add_argument("--rounds", type=int, default=None)
    ap.add_argument("--output", default=str(HERE / "RESULTS.md"))
    ap.add_argument("--compare-with", default=None, metavar="REV", help="also time this revision")
    args = ap.parse_args()
    rounds = args.rounds or (3 if args.quick else 15)
    py = sys.executable
    load0 = os.getloadavg()
    started = time.monotonic()
    with tempfile.TemporaryDirectory() as tmp:
        work = Path(tmp)
        cfg = write_run(work)
        text = cfg.read_text().replace("steps: 2000", "steps: 20")
        cfg.write_text(text)
        subprocess.run(
            [
                py,
                "-m",
                "chainyard.cli",
                "sample",
                "run.yaml",
                "--out",
                "s.zarr",
                "--progress",
                "off",
            ],
            cwd=work,
            check=True,
            capture_output=True,
        )
        commands: dict[str, list[str]] = {
            "python -c 'import numpy'": [py, "-c", "import numpy"],
            "python -c 'pass'": [py, "-c", "pass"],
            "chainyard --help": [py, "-m", "chainyard.cli", "--help"],
            "chainyard inspect STORE": [py, "-m", "chainyard.cli", "inspect", "s.zarr"],
            "chainyard sample (20 steps)": [
                py,
                "-m",
                "chainyard.cli",
                "sample",
                "run.yaml",
                "--out",
                "t.zarr",
                "--restart",
                "--progress",
                "off",
            ],
        }
        heavy = {
            "chainyard --help": _heavy_loaded(["--help"], work),
            "chainyard inspect STORE": _heavy_loaded(["inspect", "s.zarr"], work),
            "chainyard sample (20 steps)": _heavy_loaded(
                ["sample", "run.yaml", "--out", "u.zarr", "--progress", "off"], work
            ),
        }
        envs: dict[str, dict[str, str] | None] = dict.fromkeys(commands)
        if args.compare_with:
            old = work / "old"
            old.mkdir()
            archive = subprocess.run(
                ["git", "archive", args.compare_with, "plugin"],
                cwd=HERE.parents[1],
                capture_output=True,
                check=True,
            ).stdout
            subprocess.run(["tar", "-x", "-C", str(old)], input=archive, check=True)
            env = {**os.environ, "PYTHONPATH": str(old / "plugin")}
            for name in [n for n in commands if n.startswith("chainyard")]:
                label = f"{name} at {args.compare_with}"
                commands[label], envs[label] = commands[name], env
        times: dict[str, list[float]] = {k: [] for k in commands}
        for name, cmd in commands.items():  # warm the file cache once
            _cpu(cmd, work, envs[name])
        for r in range(rounds):
            names = list(commands)
            order = names[r % len(names) :] + names[: r % len(names)]
            for name in order:
                times[name].append(_cpu(commands[name], work, envs[name]))
    elapsed = time.monotonic() - started
    load1 = os.getloadavg()
    med = {k: statistics.median(v) for k, v in times.items()}
    base = med["python -c 'import numpy'"]
    ratio = med["chainyard --help"] / base
    lines = [
        "## Start-up: what a command costs before it works",
        "",
        f"Measured {time.strftime('%Y-%m-%d %H:%M UTC', time.gmtime())} with "
        f"`python tests/benchmarks/bench_startup.py` ({rounds} interleaved rounds, "
        f"{elapsed:.0f} s); CPU time (user + system) of a fresh interpreter per command, "
        f"median (min .. max). Python {platform.python_version()}, {os.cpu_count()} CPUs, "
        f"load average {load0[0]:.2f} at start, {load1[0]:.2f} at end.",
        "",
        "| command | CPU s, median (min .. max) | x `import numpy` | heavy packages imported |",
        "|---|---|---|---|",
    ]
    for name, xs in times.items():
        loaded = ", ".join(heavy[name]) if name in heavy else ""
        if " at " in name:
            loaded = "(not probed)"
        lines.append(
            f"| `{name}` | {med[name]:.3f} ({min(xs):.3f} .. {max(xs):.3f}) | "
            f"{med[name] / base:.2f} | {loaded} |"
        )
    verdict = "**met**" if ratio <= 2.0 else "**missed**"
    lines += [
        "",
        f"Target: `chainyard --help` at most 2x `import numpy`: measured {ratio:.2f}x, {verdict}.",
        "Before this work (issue 19's measurement; the rows `at REV` when measured with",
        "`--compare-with`) `--help` and `inspect` took 1.5-1.8 s of CPU: the analysis package",
        "(scipy.stats through the diagnostics) was imported to register its commands.",
        "`--help` now imports no numpy at all; `inspect` loads zarr and pydantic (the store",
        "and its config); `sample` adds emcee (without its KDE move's scipy.stats).",
        "",
    ]
    text = "\n".join(lines)
    print(text)
    if args.quick:
        return
    out = Path(args.output)
    old = out.read_text() if out.exists() else ""
    pattern = re.compile(r"## Start-up: what a command costs.*?(?=\n## (?!#)|\Z)", re.S)
    new = pattern.sub(lambda _: text.rstrip("\n"), old) if pattern.search(old) else None
    if new is None:
        new = old.rstrip("\n") + "\n\n" + text
    out.write_text(new.rstrip("\n") + "\n")


if __name__ == "__main__":
    main()

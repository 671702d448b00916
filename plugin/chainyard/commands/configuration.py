"""The ``check`` and ``schema`` commands: a run configuration on its own, before sampling.

``check`` validates a configuration and evaluates its model once; ``schema`` prints the
configuration's JSON Schema. The parsers are declared cheaply; the work is imported when a
command runs.
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path
from typing import Any

from chainyard.errors import ConfigError

__all__ = ["add_commands"]


def _cmd_schema(args: argparse.Namespace) -> int:
    from chainyard.config import json_schema

    text = json.dumps(json_schema(), indent=2, sort_keys=False)
    if args.output:
        out = Path(args.output)
        if out.is_dir():
            raise ConfigError(f"{out}: --output is a folder; give a file name")
        try:
            out.write_text(text + "\n")
        except OSError as exc:
            if exc.filename is None:
                exc.filename = str(out)
            raise
    else:
        sys.stdout.write(text + "\n")
    return 0


def _cmd_check(args: argparse.Namespace) -> int:
    import numpy as np

    from chainyard.config import load_config
    from chainyard.engine.initial import initial_state
    from chainyard.engine.registry import sampler_kind
    from chainyard.model import load_model

    config = load_config(args.config)
    model = load_model(config)
    _, log_prob, _, redraws = initial_state(config, model, 0)
    finite = log_prob[np.isfinite(log_prob)]
    seen = f"from {finite.min():.6g} to {finite.max():.6g}" if finite.size else "none finite"
    kind = sampler_kind(config.sampler.kind)
    unit = kind.axis
    again = f"; {redraws} {unit} redrawn from -inf" if redraws else ""
    note = kind.preflight(config)  # as sample does (a missing kernel file or function: exit 2)
    kernel = f"; {note}" if note else ""
    print(
        f"{args.config}: valid ({len(config.parameters)} parameters, "
        f"{config.sampler.walkers} {unit}, {config.sampler.steps:,} steps); "
        f"model evaluated at replica 0's {config.sampler.walkers} initial positions: "
        f"log_prob {seen}{again}{kernel}"
    )
    return 0


def add_commands(sub: Any) -> None:
    """Add ``check`` and ``schema`` to the ``chainyard`` subcommands."""
    p = sub.add_parser(
        "check",
        help="validate a run configuration, load its data and evaluate the model once at "
        "replica 0's initial positions",
    )
    p.add_argument("config", help="run configuration (YAML) to check")
    p.set_defaults(func=_cmd_check)

    p = sub.add_parser("schema", help="print the run configuration's JSON Schema")
    p.add_argument("--output", "-o", default=None, help="write to this file instead")
    p.set_defaults(func=_cmd_schema)

"""The ``decide``, ``derive`` and ``diagnose`` commands: a run's decisions and verdict.

``decide`` records a burn-in or thinning decision, ``derive`` writes a store with them
applied, ``diagnose`` prints the convergence diagnostics and verdict. The parsers are
declared cheaply; the analysis is imported when a command runs.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path
from typing import Any

from chainyard.commands.parsing import _int_at_least
from chainyard.errors import ConfigError, TargetsNotMetError

__all__ = ["add_commands"]


def _run_config(args: argparse.Namespace, first_store: str) -> Any:
    """The run config from --config, else the one stored with the first store."""
    from chainyard.config import load_config
    from chainyard.store import Store

    if args.config:
        return load_config(args.config)
    return Store.open(first_store).config


def _cmd_decide(args: argparse.Namespace) -> int:
    from chainyard.analysis import decide_burn_in, decide_thinning, write_record
    from chainyard.analysis.outputs import check_record_path
    from chainyard.analysis.replicas import open_replicas
    from chainyard.analysis.selection_options import selected_stores

    check_record_path(Path(args.out), "--out")
    if args.what == "burn-in":
        if args.burn_in_record or args.thinning_record or args.raw:
            raise ConfigError(
                "decide burn-in: --burn-in-record, --thinning-record and --raw belong to "
                "`decide thinning`; burn-in is decided on the sampled stores as they are"
            )
        stores = open_replicas(args.stores)
        config = _run_config(args, args.stores[0])
        decision = decide_burn_in(stores, config.burn_in)
        kind = "chainyard.burn_in_decision"
        inputs = stores
    else:
        if args.thinning_record:
            raise ConfigError("decide thinning: --thinning-record is what it writes (--out)")
        stores, views, _ = selected_stores(args, for_what="decide thinning on")
        config = _run_config(args, args.stores[0])
        decision = decide_thinning(views, config.thinning)
        kind = "chainyard.thinning_decision"
        inputs = [*stores, *([Path(args.burn_in_record)] if args.burn_in_record else [])]
    write_record(args.out, kind, {"decision": decision.to_dict()}, inputs)
    print(decision.reason)
    return 0


def _cmd_derive(args: argparse.Namespace) -> int:
    from chainyard.analysis import derive_store, read_record
    from chainyard.store import Store

    discard, factor, records = 0, 1, []
    if args.burn_in_record and args.discard is not None:
        raise ConfigError(
            "derive: --discard contradicts --burn-in-record (the recorded cut); give one"
        )
    if not args.burn_in_record and args.discard is None:
        raise ConfigError(
            "derive: give --burn-in-record FILE (from `chainyard decide burn-in`) or "
            "--discard N (steps to drop, decided by you; --discard 0 keeps any burn-in)"
        )
    if args.burn_in_record:
        rec = read_record(args.burn_in_record, "chainyard.burn_in_decision")
        discard = int(rec["decision"]["steps_discarded"])
        records.append(Path(args.burn_in_record))
    else:
        discard = args.discard
    if args.thinning_record:
        rec = read_record(args.thinning_record, "chainyard.thinning_decision")
        factor = int(rec["decision"]["factor"])
        records.append(Path(args.thinning_record))
    source = Store.open(args.source)
    from chainyard.analysis.selection import undecided_burn_in

    # decided here by a record, or upstream (a derived source whose burn-in was decided)
    decided = bool(args.burn_in_record) or (
        "derived" in source.attrs and undecided_burn_in(source.attrs) is None
    )
    store = derive_store(
        source,
        args.out,
        discard=discard,
        factor=factor,
        records=records,
        burn_in_decided=decided,
    )
    how = "" if decided else "; burn-in not decided by a record"
    print(
        f"{args.out}: {store.steps_done:,} steps (discarded {discard:,}, kept every {factor}{how})"
    )
    return 0


def _cmd_diagnose(args: argparse.Namespace) -> int:
    from chainyard.analysis import diagnose, format_table, write_record
    from chainyard.analysis.replicas import open_replicas
    from chainyard.analysis.selection_options import selected_stores

    if args.json:
        from chainyard.analysis.outputs import check_record_path

        check_record_path(Path(args.json), "--json")
    stores, views, selection = selected_stores(args, for_what="diagnose")
    config = _run_config(args, args.stores[0])
    result = diagnose(views, config.targets)
    result["selection"] = selection.description
    if args.reference:
        from chainyard.analysis.diagnose_reference import compare_with_reference

        reference = open_replicas(args.reference)
        result["reference"] = compare_with_reference(
            views, result, reference, ", ".join(args.reference)
        )
    records = [Path(r) for r in (args.burn_in_record, args.thinning_record) if r]
    if args.json:
        write_record(args.json, "chainyard.diagnostics", result, [*stores, *records])
    print(format_table(result, title=args.title or "", selection=selection.description))
    verdict = result["verdict"]
    if args.strict and not verdict["ok"]:
        sys.stdout.flush()
        failed = [name for name, c in verdict["params"].items() if not c["ok"]]
        which = f" ({', '.join(failed)})" if failed else " (the multivariate check)"
        more = verdict.get("more_steps")
        hint = f"; about {more:,} more steps needed" if more else ""
        raise TargetsNotMetError(
            f"targets not met for {len(failed)} of {len(verdict['params'])} "
            f"parameters{which}{hint}; see the table above (--strict)"
        )
    return 0


def add_commands(sub: Any) -> None:
    """Add ``decide``, ``derive`` and ``diagnose`` to the ``chainyard`` subcommands."""
    p = sub.add_parser("decide", help="record a burn-in or thinning decision for a run")
    p.add_argument(
        "what",
        choices=["burn-in", "thinning"],
        help="burn-in: steps to discard, decided on the sampled stores; thinning: the factor, "
        "decided on the stores after burn-in (the config's burn_in/thinning policy)",
    )
    p.add_argument(
        "stores",
        nargs="+",
        help="the run's replica stores: sampled ones for burn-in; for thinning, derived ones "
        "(after burn-in), or sampled ones with --burn-in-record (or --raw)",
    )
    p.add_argument("--out", required=True, help="decision record (JSON) to write")
    p.add_argument(
        "--config", default=None, help="run config with the policy (default: the one stored)"
    )
    from chainyard.analysis.selection_options import add_selection_options

    add_selection_options(p, "thinning: ")
    p.set_defaults(func=_cmd_decide)

    p = sub.add_parser("derive", help="write a store with burn-in discarded and/or thinned")
    p.add_argument("source", help="store to derive from")
    p.add_argument(
        "--out",
        required=True,
        help="derived store to write; only a derived store already there is replaced (the "
        "source, folders holding it, the current folder and anything else are refused)",
    )
    p.add_argument("--burn-in-record", default=None, help="burn-in decision record")
    p.add_argument(
        "--discard",
        type=_int_at_least(0),
        default=None,
        metavar="N",
        help="without a burn-in record: drop the first N steps, decided by you (--discard 0 "
        "keeps every step; the derived store records that burn-in was not decided)",
    )
    p.add_argument("--thinning-record", default=None, help="thinning decision record")
    p.set_defaults(func=_cmd_derive)

    p = sub.add_parser("diagnose", help="convergence diagnostics and verdict for a run")
    p.add_argument(
        "stores",
        nargs="+",
        help="the run's replica stores: derived ones (after burn-in), or sampled ones with "
        "--burn-in-record (or --raw)",
    )
    from chainyard.analysis.selection_options import add_selection_options

    add_selection_options(p, "")
    p.add_argument(
        "--config", default=None, help="run config with the targets (default: the one stored)"
    )
    p.add_argument("--json", default=None, help="also write the diagnostics record here")
    p.add_argument("--title", default=None, help="heading for the table")
    p.add_argument(
        "--strict", action="store_true", help="exit with status 1 when the targets are not met"
    )
    p.add_argument(
        "--reference",
        nargs="+",
        default=None,
        metavar="STORE",
        help="compare the draws with a reference run's stores (e.g. accept-reject) by a "
        "two-sample Kolmogorov-Smirnov test per parameter",
    )
    p.set_defaults(func=_cmd_diagnose)

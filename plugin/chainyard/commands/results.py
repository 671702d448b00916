"""The ``export``, ``results-table`` and ``plot`` commands: a run's results from the command line.

Each takes the replica stores of one run and chooses the draws as
:mod:`chainyard.analysis.selection` describes (derived stores as they are; sampled stores with
``--burn-in-record``/``--thinning-record``, or ``--raw``).
"""

from __future__ import annotations

import argparse
import dataclasses
import sys
from pathlib import Path
from typing import Any

from chainyard.errors import ConfigError

__all__ = ["add_commands"]


def _open(args: argparse.Namespace) -> tuple[list[Any], Any]:
    """The stores (sorted by replica) and the selection the options ask for."""
    from chainyard.analysis.selection import choose_selection
    from chainyard.store import Store

    stores = sorted((Store.open(p) for p in args.stores), key=lambda s: s.replica)
    exact = _exact_draws(stores) and not (args.raw or args.burn_in_record or args.thinning_record)
    selection = choose_selection(
        stores,
        raw=args.raw or exact,
        burn_in_record=args.burn_in_record,
        thinning_record=args.thinning_record,
    )
    if selection.note:  # a derived store whose burn-in no record decided
        print(f"note: {stores[0].path}: {selection.note}", file=sys.stderr)
    if exact:
        selection = dataclasses.replace(
            selection, description="every draw; accept-reject draws are exact: no burn-in"
        )
    lengths = {s.steps_done for s in stores}
    if len(lengths) > 1:
        print(
            f"note: the replicas hold {min(lengths):,} to {max(lengths):,} steps; the first "
            f"{min(lengths):,} of each are used (chains of equal length)",
            file=sys.stderr,
        )
    return stores, selection


def _exact_draws(stores: list[Any]) -> bool:
    """Sampled (not derived) accept-reject stores: exact, independent draws that need no
    burn-in decision (the store's ``sampler_kind`` attribute says so)."""
    attrs = stores[0].attrs
    return attrs.get("sampler_kind") == "accept_reject" and "derived" not in attrs


def _records(args: argparse.Namespace) -> list[Path]:
    return [Path(r) for r in (args.burn_in_record, args.thinning_record) if r]


def _cmd_export(args: argparse.Namespace) -> int:
    from chainyard.analysis.export_files import export_format, export_run

    export_format(Path(args.output))  # a wrong extension fails before any store is read
    stores, selection = _open(args)
    line = export_run(stores, selection, args.output, inputs=_records(args), force=args.force)
    print(line)
    return 0


def _quantiles(args: argparse.Namespace) -> tuple[float, ...]:
    from chainyard.analysis.summary_table import interval_quantiles

    if args.quantiles is None:
        return interval_quantiles(0.9 if args.interval is None else args.interval)
    out = []
    for text in args.quantiles.split(","):
        try:
            q = float(text)
        except ValueError:
            raise ConfigError(
                f"--quantiles: {text.strip()!r} is not a number; give probabilities between 0 "
                "and 1 separated by commas (e.g. 0.025,0.5,0.975)"
            ) from None
        if not 0.0 < q < 1.0:
            raise ConfigError(f"--quantiles: {q:g} is not between 0 and 1 (exclusive)")
        out.append(q)
    return tuple(out)


def _interval(text: str) -> float:
    """An argparse type: a probability strictly between 0 and 1."""
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(
            f"must be a number between 0 and 1, got {text!r}"
        ) from None
    if not 0.0 < value < 1.0:
        raise argparse.ArgumentTypeError(f"must be between 0 and 1 (exclusive), got {value:g}")
    return value


#: the command's old name: still accepted for one release, unlisted, with one deprecation line
OLD_TABLE_COMMAND = "summarise"
TABLE_COMMAND = "results-table"


class _Unlisted(dict[str, Any]):
    """Subcommand parsers by name; names in :attr:`unlisted` work but are not offered
    (argparse lists the choices by iterating the names)."""

    unlisted: frozenset[str] = frozenset({OLD_TABLE_COMMAND})

    def __iter__(self) -> Any:
        return (k for k in super().__iter__() if k not in self.unlisted)


def _cmd_old_table(args: argparse.Namespace) -> int:
    print(
        f"note: `chainyard {OLD_TABLE_COMMAND}` is now `chainyard {TABLE_COMMAND}` (same "
        "options, new column names); the old name goes away in the next release",
        file=sys.stderr,
    )
    return _cmd_table(args)


def _cmd_table(args: argparse.Namespace) -> int:
    from chainyard.analysis.selection import selected
    from chainyard.analysis.summary_table import format_summary, summary_table

    qs = _quantiles(args)
    stores, selection = _open(args)
    table = summary_table(selected(stores, selection), qs)
    how = "json" if args.json else "csv" if args.csv else "text"
    print(format_summary(table, how))
    return 0


def _cmd_plot(args: argparse.Namespace) -> int:
    from chainyard.analysis.diagnose import diagnose
    from chainyard.analysis.selection import selected
    from chainyard.report.pairs import pairs_plot
    from chainyard.report.plot_outputs import check_plot_folder
    from chainyard.report.plots import acceptance_plot, tau_history_plot, trace_plot
    from chainyard.report.references import reference_values

    folder = Path(args.output)
    check_plot_folder(folder, [Path(p) for p in args.stores] + _records(args))
    stores, selection = _open(args)
    refs = reference_values(stores[0], args.reference_values)
    views = selected(stores, selection)
    diag = diagnose(views)
    derived = "derived" in stores[0].attrs
    whole = views if derived else stores  # traces and acceptance: every sampled step
    cut = None if (derived or not selection.records) else selection.discard
    folder.mkdir(parents=True, exist_ok=True)
    xlabel = "draw (after the stores' burn-in and thinning)" if derived else "step"
    if _exact_draws(stores):
        xlabel = "draw"  # accept-reject: one exact draw per row
    trace_plot(whole, cut, folder / "traces.png", references=refs, xlabel=xlabel)
    tau_history_plot(views, folder / "tau.png", diagnostics=diag)
    pairs_plot(views, folder / "pairs.png", references=refs)
    acceptance_plot(whole, folder / "acceptance.png", diag)
    print(f"{folder}: traces.png, tau.png, pairs.png, acceptance.png ({selection.description})")
    return 0


def _selection_options(p: argparse.ArgumentParser) -> None:
    p.add_argument(
        "stores",
        nargs="+",
        metavar="STORE",
        help="the replica stores of one run: derived stores (e.g. standalone/replica-R.zarr) as "
        "they are, or sampled stores with --burn-in-record or --raw",
    )
    p.add_argument(
        "--burn-in-record",
        default=None,
        metavar="FILE",
        help="burn-in decision record (from `chainyard decide burn-in`) to apply to sampled stores",
    )
    p.add_argument(
        "--thinning-record",
        default=None,
        metavar="FILE",
        help="thinning decision record to apply after the burn-in",
    )
    p.add_argument(
        "--raw",
        action="store_true",
        help="use every committed draw of sampled stores (burn-in included)",
    )


def _table_options(p: argparse.ArgumentParser) -> None:
    _selection_options(p)
    which = p.add_mutually_exclusive_group()
    which.add_argument(
        "--interval",
        type=_interval,
        default=None,
        metavar="P",
        help="central credible interval holding probability P: its ends and the median are "
        "reported (default 0.9: lower_5pct, median, upper_95pct)",
    )
    which.add_argument(
        "--quantiles",
        default=None,
        metavar="Q,Q,...",
        help="report these quantiles instead (probabilities, e.g. 0.025,0.5,0.975 give "
        "lower_2.5pct, median, upper_97.5pct)",
    )
    how = p.add_mutually_exclusive_group()
    how.add_argument("--json", action="store_true", help="print JSON instead of a table")
    how.add_argument("--csv", action="store_true", help="print CSV instead of a table")


def add_commands(sub: Any) -> None:
    """Add ``export``, ``results-table`` and ``plot`` to the ``chainyard`` subcommands."""
    p = sub.add_parser(
        "export",
        help="write a run's draws as ArviZ netCDF (.nc), zarr (.zarr) or CSV (.csv)",
        description="Write the draws of a run's replica stores in the format of -o's "
        "extension: .nc (netCDF-4) and .zarr hold an ArviZ DataTree (posterior: chain = "
        "replica x walker, draw; sample_stats: lp, accepted); .csv has one row per draw.",
    )
    _selection_options(p)
    p.add_argument("-o", "--output", required=True, metavar="FILE", help="FILE.nc, .zarr or .csv")
    p.add_argument(
        "--force",
        action="store_true",
        help="replace an earlier export at FILE (a store or an input is never replaced)",
    )
    p.set_defaults(func=_cmd_export)

    p = sub.add_parser(
        TABLE_COMMAND,
        help="per parameter: mean, sd, quantiles, their MCSE, ESS, R-hat (as summary.csv)",
        description="Per parameter, in the config's order: mean, sd and the quantiles "
        "(lower_5pct, median, upper_95pct by default), then the MCSE of each in the same "
        "order (mcse_mean, ...), then bulk_ess, tail_ess, rhat, nested_rhat. The workflow's "
        "summary.csv has the same columns.",
    )
    _table_options(p)
    p.set_defaults(func=_cmd_table)
    sub.choices = sub._name_parser_map = _Unlisted(sub._name_parser_map)
    p = sub.add_parser(OLD_TABLE_COMMAND)  # no help: not listed in --help
    _table_options(p)
    p.set_defaults(func=_cmd_old_table)

    p = sub.add_parser(
        "plot",
        help="the workflow's plots (traces, tau, pairs, acceptance) as PNGs in a folder",
    )
    _selection_options(p)
    p.add_argument(
        "-o", "--output", required=True, metavar="DIR", help="folder for the four PNG files"
    )
    p.add_argument(
        "--reference-values",
        default=None,
        metavar="FILE",
        help="values to draw on traces and marginals (a simulation's truths, a previous "
        'estimate): JSON {"name": value} or CSV with columns parameter,value; overrides '
        "the config's reference_value",
    )
    p.set_defaults(func=_cmd_plot)

"""The command-line subcommands verify, inspect, pack, unpack and export-prov.

:func:`add_commands` registers them on the ``chainyard`` parser (see :mod:`chainyard.cli`).
Failures are :class:`~chainyard.errors.ChainyardError`; the command line prints them as one
``chainyard: error: ...`` line and exits with their status (7 for a failed verification).
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path
from typing import Any

from chainyard.errors import ChainyardError, VerificationError

__all__ = ["add_commands"]


def _replay_steps(text: str) -> int | None:
    if text == "all":
        return None
    try:
        n = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(
            f"expected a number of steps or 'all', got {text!r}"
        ) from None
    if n < 1:
        raise argparse.ArgumentTypeError("must be >= 1")
    return n


def _check_replay_allowed(args: argparse.Namespace) -> None:
    """Refuse (exit 2) to replay code that came with a store or pack without
    --run-pack-code, before anything is read."""
    from chainyard.provenance.replay import require_code_consent
    from chainyard.store import Store

    path = Path(args.target)
    if path.is_file() and path.suffix.lower() in (".json", ".png"):
        return
    try:
        store = Store.open(path)
    except ChainyardError:
        return  # verify reports it
    try:
        require_code_consent(store, args.run_pack_code, args.sources)
    finally:
        store.close()


def _cmd_verify(args: argparse.Namespace) -> int:
    from chainyard.provenance.replay import replay
    from chainyard.provenance.verify import verify

    wants_replay = args.replay is not False or args.replay_segment is not None
    if wants_replay:
        _check_replay_allowed(args)
    report = verify(args.target, chain=not args.no_chain)
    out: dict[str, Any] = {"verify": report.to_dict(), "replay": None}
    if not args.json:
        print("\n".join(report.lines()), flush=True)
    result = None
    if wants_replay and report.ok and report.kind != "record":
        steps = None if args.replay is False else args.replay
        result = replay(
            args.target,
            steps,
            segment=args.replay_segment,
            sources=args.sources,
            run_pack_code=args.run_pack_code,
        )
        out["replay"] = result.to_dict()
        if not args.json:
            print(result.line(), flush=True)
    if args.json:
        print(json.dumps(out, indent=1, sort_keys=True))
    if not report.ok:
        first = report.problems[0]
        more = f" (and {len(report.problems) - 1} more)" if len(report.problems) > 1 else ""
        raise VerificationError(f"{args.target}: verification failed: {first}{more}")
    if wants_replay and report.kind == "record":
        raise VerificationError(f"{args.target}: a record cannot be replayed; give a store")
    if result is not None and not result.ok:
        raise VerificationError(result.line())
    return 0


def _cmd_inspect(args: argparse.Namespace) -> int:
    from chainyard.provenance.inspect import format_summary, inspect_store

    summary = inspect_store(args.store, diagnostics=args.diagnostics)
    if args.json:
        print(json.dumps(summary, indent=1, sort_keys=True))
    else:
        print(format_summary(summary))
    return 0


def _cmd_pack(args: argparse.Namespace) -> int:
    from chainyard.provenance.pack import pack_store

    info = pack_store(
        args.store, args.out, records=args.record, include_sources=not args.no_sources
    )
    print(f"{info.path}: {info.members} members; sha256 {info.sha256}")
    return 0


def _cmd_unpack(args: argparse.Namespace) -> int:
    from chainyard.provenance.pack import unpack_store

    out = unpack_store(args.pack, args.out)
    print(f"{out}: unpacked; every member matched the manifest")
    return 0


def _cmd_export_prov(args: argparse.Namespace) -> int:
    from chainyard.errors import StoreError
    from chainyard.provenance.prov_json import prov_json
    from chainyard.provenance.record import provenance_record
    from chainyard.provenance.verify import DAMAGE, describe_damage

    try:
        text = prov_json(provenance_record(args.target))
    except DAMAGE as exc:
        raise StoreError(
            f"{args.target}: damaged metadata, cannot export its provenance "
            f"({describe_damage(exc)}); `chainyard verify` names the problem"
        ) from None
    if args.out:
        Path(args.out).write_text(text + "\n")
    else:
        sys.stdout.write(text + "\n")
    return 0


def add_commands(sub: Any) -> None:
    """Add verify, inspect, pack, unpack and export-prov to the subcommand ``sub`` parsers."""
    p = sub.add_parser("verify", help="check every chunk, the counters and the provenance chain")
    p.add_argument("target", help="store directory, packed store (.zip) or JSON record")
    p.add_argument(
        "--replay",
        nargs="?",
        const="all",
        default=False,
        type=_replay_steps,
        metavar="N",
        help="also rerun the first N steps (default all) and compare them bitwise; this "
        "imports and runs the model (a store's own config names it; for a pack, see "
        "--run-pack-code)",
    )
    p.add_argument(
        "--replay-segment",
        type=int,
        default=None,
        metavar="K",
        help="also rerun segment K of the history from its recorded start and compare it",
    )
    p.add_argument(
        "--sources",
        default=None,
        metavar="DIR",
        help="directory holding the model and data for a replay (default: the pack's copies, "
        "else where the config was)",
    )
    p.add_argument(
        "--run-pack-code",
        "--run-stored-code",
        dest="run_pack_code",
        action="store_true",
        help="allow --replay on code that came with the store: it imports and runs the model "
        "code and config of a pack (packed or unpacked) or model files inside a store's own "
        "folder; only for stores and packs from people you trust",
    )
    p.add_argument(
        "--no-chain", action="store_true", help="do not check the inputs a store or record names"
    )
    p.add_argument("--json", action="store_true", help="print the report as JSON")
    p.set_defaults(func=_cmd_verify)

    p = sub.add_parser("inspect", help="summarise a store: what, when, steps, verdict, provenance")
    p.add_argument("store", help="store directory or packed store (.zip)")
    p.add_argument(
        "--diagnostics",
        action="append",
        default=[],
        metavar="FILE",
        help="diagnostics record to take the verdict from (default: one found nearby)",
    )
    p.add_argument("--json", action="store_true", help="print the summary as JSON")
    p.set_defaults(func=_cmd_inspect)

    p = sub.add_parser("pack", help="write a store with its records and sources into one file")
    p.add_argument("store", help="store directory to pack")
    p.add_argument("--out", required=True, help="archive to write (.zip)")
    p.add_argument(
        "--record",
        action="append",
        default=[],
        metavar="FILE",
        help="also include this decision or diagnostics record (repeatable)",
    )
    p.add_argument("--no-sources", action="store_true", help="leave the model and data out")
    p.set_defaults(func=_cmd_pack)

    p = sub.add_parser("unpack", help="extract a packed store into a directory")
    p.add_argument("pack", help="archive written by `chainyard pack`")
    p.add_argument("--out", required=True, help="directory to create")
    p.set_defaults(func=_cmd_unpack)

    p = sub.add_parser("export-prov", help="print the provenance as W3C PROV-JSON")
    p.add_argument("target", help="store, packed store or JSON record")
    p.add_argument("--out", "-o", default=None, help="write to this file instead")
    p.set_defaults(func=_cmd_export_prov)

    p = sub.add_parser(
        "publish", help="copy a finished store or pack to object storage, verified there"
    )
    p.add_argument("store", help="local store directory or packed store (.zip)")
    p.add_argument("destination", help="s3://BUCKET/PATH (a path that holds no objects yet)")
    p.set_defaults(func=_cmd_publish)


def _cmd_publish(args: argparse.Namespace) -> int:
    from chainyard.provenance.publish import publish

    print(publish(args.store, args.destination))
    return 0

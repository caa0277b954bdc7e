"""``ergodex models …``: list, inspect, promote, retire, export and import registered surrogates.

Subcommands::

    ergodex models list [--json]
    ergodex models show NAME[/VERSION] [--json]
    ergodex models history NAME[/VERSION] [--json]
    ergodex models accept NAME/VERSION [--reason R] [--override]
    ergodex models reject NAME/VERSION --reason R
    ergodex models retire NAME/VERSION --reason R
    ergodex models export NAME[/VERSION] --to DIR
    ergodex models import DIR [--name NAME]
    ergodex models verify [NAME[/VERSION]] [--json]

``--json`` output (stable keys; new keys may be added, none removed or renamed):

* ``list``: ``{"home": str, "models": [{"name": str, "versions": int, "latest": int,
  "accepted": int | null, "statuses": {"candidate": int, "accepted": int, "rejected": int,
  "retired": int}, "integrity_failed": [int]}]}`` (versions whose files no longer match their
  recorded sha256)
* ``show NAME/V`` (or ``show NAME``: its accepted version): ``{"ref": "name/v",
  "name": str, "version": int, "status": str, "created": str (UTC ISO 8601), "note": str,
  "parent": "name/v" | null, "datasets": [{"role", "fingerprint", "source"}], "verdict": "pass" |
  "fail" | "inconclusive" | null, "data_fingerprint": str | null, "model_fingerprint": str | null,
  "scorecard_model_fingerprint": str | null, "artifacts": {filename: sha256}, "folder": str,
  "integrity": "ok" | "failed", "integrity_problems": [str]}``.
  ``show NAME --all`` lists every version: ``{"name": str, "versions": [<as above>]}``.
* ``history``: ``{"name": str, "events": [{"id": int, "time": str, "name": str, "version": int,
  "event": str, "from_status": str | null, "to_status": str | null, "actor": str,
  "reason": str, "override": bool}], "integrity_failed": [int]}``
* ``verify``: ``{"home": str, "ok": bool, "versions": [{"ref": "name/v", "status": str,
  "integrity": "ok" | "failed", "problems": [str]}]}``

Every status or verdict shown is read with every file of the version hashed: a version whose
files changed is marked INTEGRITY FAILED (``"integrity": "failed"`` in JSON), its status and
verdict are not to be trusted. ``models verify`` names each changed or missing file with its
expected and actual sha256.

Exit codes: 0 done (``verify``: every file matches); 1 ``verify`` found a changed or missing file;
2 bad input (unknown name or version, forbidden status change, bad name, changed file when
accepting or exporting) with one line on stderr and nothing changed.
"""

from __future__ import annotations

import argparse
import json
import sys
from typing import Any

from ergodex import CAUTION
from ergodex.cli.common import add_home_option, registry_from_args


def add_parser(subparsers: argparse._SubParsersAction) -> None:
    parser = subparsers.add_parser(
        "models",
        help="list, show, accept, reject, retire, verify, export or import registered models",
        description=(
            "Work with the registry (--home DIR, else $ERGODEX_HOME, else ./models). Versions "
            "are immutable; statuses go candidate -> accepted | rejected, accepted -> retired, "
            "and every change is recorded with time, user and reason. A name has at most one "
            "accepted version: accepting one retires the previous. Files are hashed whenever a "
            "status is shown; a missing, empty, corrupt or older index is rebuilt from the "
            "version folders' own records (with a warning), and nothing is ever deleted. A "
            "version is NAME/VERSION (e.g. loop/3); NAME/current, or NAME alone, is the "
            "accepted one."
        ),
    )
    actions = parser.add_subparsers(
        dest="models_command", metavar="ACTION", parser_class=type(parser)
    )
    parser.set_defaults(func=_missing_action(parser))

    p = actions.add_parser("list", help="every model name with its version counts")
    _common(p, json_output=True)
    p.set_defaults(func=run_list)

    p = actions.add_parser(
        "show", help="one version (NAME/V) or the accepted one (NAME or NAME/current)"
    )
    p.add_argument("ref", metavar="NAME[/VERSION]")
    p.add_argument("--all", action="store_true", help="every version of NAME")
    _common(p, json_output=True)
    p.set_defaults(func=run_show)

    p = actions.add_parser("history", help="every recorded event of a model (or one version)")
    p.add_argument("ref", metavar="NAME[/VERSION]")
    _common(p, json_output=True)
    p.set_defaults(func=run_history)

    p = actions.add_parser(
        "accept",
        help="promote a candidate (the previously accepted version is retired); needs a "
        "passing scorecard unless --override with --reason",
    )
    p.add_argument("ref", metavar="NAME/VERSION")
    p.add_argument("--reason", default="", help="why (required with --override)")
    p.add_argument(
        "--override",
        action="store_true",
        help="accept although the scorecard failed or is missing; recorded in the history",
    )
    _common(p)
    p.set_defaults(func=run_accept)

    for action, text in (
        ("reject", "mark a candidate rejected"),
        ("retire", "take an accepted version out of use"),
    ):
        p = actions.add_parser(action, help=text)
        p.add_argument("ref", metavar="NAME/VERSION")
        p.add_argument("--reason", required=True, help="why (recorded in the history)")
        _common(p)
        p.set_defaults(func=run_reject if action == "reject" else run_retire)

    p = actions.add_parser(
        "verify",
        help="hash every file of every version (or of NAME, or NAME/V); exit 1 if one changed",
    )
    p.add_argument("ref", metavar="NAME[/VERSION]", nargs="?", default=None)
    _common(p, json_output=True)
    p.set_defaults(func=run_verify)

    p = actions.add_parser(
        "export", help="write a self-contained folder for someone without ergodex"
    )
    p.add_argument("ref", metavar="NAME[/VERSION]")
    p.add_argument("--to", required=True, metavar="DIR", help="new (or empty) folder to write")
    _common(p)
    p.set_defaults(func=run_export)

    p = actions.add_parser("import", help="register an exported folder as a new candidate")
    p.add_argument("folder", metavar="DIR")
    p.add_argument(
        "--name", default=None, help="register under this name (default: the exported one)"
    )
    _common(p)
    p.set_defaults(func=run_import)


def _common(parser: argparse.ArgumentParser, *, json_output: bool = False) -> None:
    if json_output:
        parser.add_argument(
            "--json", action="store_true", help="machine-readable output (stable keys)"
        )
    add_home_option(parser)


def _missing_action(parser: argparse.ArgumentParser):
    def run(args: argparse.Namespace) -> int:
        parser.print_help(sys.stderr)
        return 2

    return run


def _print_json(payload: Any) -> None:
    print(json.dumps(payload, indent=2, sort_keys=True))


def run_list(args: argparse.Namespace) -> int:
    registry = registry_from_args(args)
    models = registry.list_models()
    if args.json:
        _print_json({"home": str(registry.home), "models": [m.to_dict() for m in models]})
        return 0
    if not models:
        print(f"no models in {registry.home}")
        return 0
    print(f"{'name':<32} {'versions':>8} {'latest':>6} {'accepted':>8}  statuses")
    for m in models:
        counts = ", ".join(f"{n} {s}" for s, n in m.statuses.items() if n)
        accepted = "-" if m.accepted is None else str(m.accepted)
        if m.integrity_failed:
            counts += "  INTEGRITY FAILED: " + ", ".join(
                f"{m.name}/{v}" for v in m.integrity_failed
            )
        print(f"{m.name:<32} {m.versions:>8} {m.latest:>6} {accepted:>8}  {counts}")
    if any(m.integrity_failed for m in models):
        print("files changed after registration: run 'ergodex models verify' for details")
    return 0


def _status_text(info) -> str:
    """The status, marked when the version's files no longer match their hashes."""
    return info.status if info.integrity != "failed" else f"{info.status}, INTEGRITY FAILED"


def _verdict_text(info) -> str:
    verdict = info.verdict or "none"
    return verdict if info.integrity != "failed" else f"{verdict} (unverified: files changed)"


def run_show(args: argparse.Namespace) -> int:
    from ergodex.registry import parse_ref

    registry = registry_from_args(args)
    name, version = parse_ref(args.ref)
    if args.all:
        infos = registry.versions(name) if version is None else [registry.get(args.ref)]
        if args.json:
            _print_json({"name": name, "versions": [i.to_dict() for i in infos]})
        else:
            for info in infos:
                verdict = info.verdict or "-"
                flag = "  INTEGRITY FAILED" if info.integrity == "failed" else ""
                print(
                    f"{info.ref:<24} {info.status:<10} {verdict:<12} {info.created}  "
                    f"{info.note}{flag}"
                )
        return 0
    info = registry.get(args.ref)
    if args.json:
        _print_json(info.to_dict())
        return 0
    print(f"{info.ref}  [{_status_text(info)}]")
    for problem in info.integrity_problems:
        print(f"  changed:     {problem}")
    print(f"  created:     {info.created}")
    print(f"  scorecard:   {_verdict_text(info)}")
    if info.note:
        print(f"  note:        {info.note}")
    if info.parent:
        print(f"  parent:      {info.parent}")
    for d in info.datasets:
        source = f" ({d['source']})" if d.get("source") else ""
        print(f"  {d['role'] + ' data:':<13}{d['fingerprint']}{source}")
    print(f"  model:       {info.model_fingerprint or '-'}")
    print(f"  folder:      {info.folder}")
    for filename, digest in info.artifacts.items():
        print(f"    {filename:<20} sha256 {digest}")
    if info.status == "accepted":
        print(f"Caution: {CAUTION}")
    return 0


def run_verify(args: argparse.Namespace) -> int:
    registry = registry_from_args(args)
    infos = registry.check_integrity(args.ref)
    ok = all(i.integrity == "ok" for i in infos)
    if args.json:
        _print_json(
            {
                "home": str(registry.home),
                "ok": ok,
                "versions": [
                    {
                        "ref": i.ref,
                        "status": i.status,
                        "integrity": i.integrity,
                        "problems": i.integrity_problems,
                    }
                    for i in infos
                ],
            }
        )
        return 0 if ok else 1
    for info in infos:
        if info.integrity == "ok":
            print(f"ok      {info.ref} ({info.status}, {len(info.artifacts)} files)")
        else:
            print(f"FAILED  {info.ref} ({info.status})")
            for problem in info.integrity_problems:
                print(f"        {problem}")
    failed = sum(i.integrity != "ok" for i in infos)
    print(f"{len(infos)} versions checked in {registry.home}; {failed} with changed files")
    return 0 if ok else 1


def run_history(args: argparse.Namespace) -> int:
    from ergodex.registry import parse_ref

    registry = registry_from_args(args)
    events = registry.history(args.ref)
    name, _ = parse_ref(args.ref)
    failed = [i for i in registry.check_integrity(args.ref) if i.integrity != "ok"]
    if args.json:
        _print_json(
            {
                "name": name,
                "events": [e.to_dict() for e in events],
                "integrity_failed": [i.version for i in failed],
            }
        )
        return 0
    for info in failed:
        print(
            f"warning: {info.ref} INTEGRITY FAILED (its files changed after registration; "
            "its status and verdict are not to be trusted): run 'ergodex models verify'"
        )
    for e in events:
        change = (
            f"{e.from_status or '-'} -> {e.to_status}"
            if e.from_status != e.to_status
            else e.to_status
        )
        flag = "  OVERRIDE" if e.override else ""
        reason = f"  reason: {e.reason}" if e.reason else ""
        print(
            f"{e.time}  {e.name}/{e.version}  {e.event:<16} {change:<24} by {e.actor}{flag}{reason}"
        )
    return 0


def run_accept(args: argparse.Namespace) -> int:
    registry = registry_from_args(args)
    info = registry.accept(args.ref, reason=args.reason, override=args.override)
    print(f"{info.ref} accepted")
    return 0


def run_reject(args: argparse.Namespace) -> int:
    info = registry_from_args(args).reject(args.ref, reason=args.reason)
    print(f"{info.ref} rejected")
    return 0


def run_retire(args: argparse.Namespace) -> int:
    info = registry_from_args(args).retire(args.ref, reason=args.reason)
    print(f"{info.ref} retired")
    return 0


def run_export(args: argparse.Namespace) -> int:
    registry = registry_from_args(args)
    info = registry.get(args.ref)
    folder = registry.export(info, args.to)
    print(f"exported {info.ref} to {folder}")
    return 0


def run_import(args: argparse.Namespace) -> int:
    info = registry_from_args(args).import_folder(args.folder, name=args.name)
    print(f"imported {args.folder} as {info.ref} (candidate)")
    return 0

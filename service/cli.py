"""The ``tidegate`` command.

Exit codes of ``tidegate submit`` (for the retraining job): 0 promote, 3 hold, 4 error
(rejected post, service unreachable, bad file). Other commands: 0 on success, 4 on error,
2 on a usage error.
"""

from __future__ import annotations

import argparse
import json
import logging
import sys
from collections.abc import Sequence
from pathlib import Path
from typing import Any

from service.cli_local import (
    cmd_db,
    cmd_demo,
    cmd_policy_check,
    cmd_prune,
    cmd_serve,
    cmd_token,
)
from service.cli_local import (
    print_json as _print_json,
)

EXIT_OK = 0
EXIT_HOLD = 3
EXIT_ERROR = 4


def _client(args: argparse.Namespace) -> Any:
    from service.client import TidegateClient

    return TidegateClient(args.url, token=args.token)


def _remote(args: argparse.Namespace, call: Any) -> Any:
    """``call(client)`` against the service; prints the error and returns None on failure."""
    from service.client import ClientError

    try:
        with _client(args) as client:
            return call(client)
    except ClientError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return None


# --- the retraining job ---------------------------------------------------------------------


def cmd_submit(args: argparse.Namespace) -> int:
    from service.explain import explain

    try:
        text = sys.stdin.read() if args.file == "-" else Path(args.file).read_text("utf-8")
        body = json.loads(text)
        if not isinstance(body, dict):
            raise ValueError("the file must hold one JSON object")
    except (OSError, ValueError) as exc:
        print(f"error: cannot read {args.file}: {exc}", file=sys.stderr)
        return EXIT_ERROR
    model = args.model or body.pop("model", None)
    body.pop("model", None)
    if not model:
        print('error: give --model or a "model" field in the file', file=sys.stderr)
        return EXIT_ERROR
    verdict = _remote(args, lambda client: client.post_snapshot(model, body))
    if verdict is None:
        return EXIT_ERROR
    if args.json:
        _print_json(verdict)
    else:
        print(explain(verdict))
    return EXIT_OK if verdict["decision"] == "promote" else EXIT_HOLD


# --- on-call --------------------------------------------------------------------------------


def _find_verdict(client: Any, model: str, snapshot: str | None) -> dict[str, Any]:
    if snapshot is None:
        return client.latest_verdict(model)  # type: ignore[no-any-return]
    snap = client.snapshot(model, snapshot)
    if snap.get("verdict_id") is None:
        from service.client import ClientError

        raise ClientError(404, "not_found", f"snapshot {snapshot!r} has no verdict")
    return client.verdict(snap["verdict_id"])  # type: ignore[no-any-return]


def cmd_why(args: argparse.Namespace) -> int:
    from service.client import ClientError
    from service.explain import explain

    try:
        with _client(args) as client:
            verdict = _find_verdict(client, args.model, args.snapshot)
            evidence = client.evidence(verdict["verdict_id"])
    except ClientError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return EXIT_ERROR
    if args.json:
        _print_json({"verdict": verdict, "evidence": evidence})
    else:
        print(explain(verdict, evidence, ascii_only=_ascii_only()))
    return EXIT_OK


def _ascii_only() -> bool:
    """True when standard output cannot print the sparkline's block characters."""
    try:
        "▁█→×".encode(sys.stdout.encoding or "ascii")
    except (UnicodeEncodeError, LookupError):
        return True
    return False


def cmd_history(args: argparse.Namespace) -> int:

    page = _remote(
        args, lambda client: client.verdicts(args.model, limit=args.limit, decision=args.decision)
    )
    if page is None:
        return EXIT_ERROR
    if args.json:
        _print_json(page)
        return EXIT_OK
    for v in page["data"]:
        flag = " (overridden to " + v["effective_decision"] + ")" if v["overridden"] else ""
        reason = v["reasons"][0] if v["reasons"] else ""
        print(
            f"{v['verdict_id']:>6}  {v['created_at']}  {v['snapshot']:<24} "
            f"{v['decision']:<8}{flag} {reason}"
        )
    return EXIT_OK


def cmd_baseline_set(args: argparse.Namespace) -> int:

    result = _remote(
        args, lambda client: client.set_baseline(args.model, args.snapshot, args.reason)
    )
    if result is None:
        return EXIT_ERROR
    print(
        f"{result['model']}: baseline is now {result['baseline']} "
        f"(was {result['previous'] or 'none'}; {result['cause']})"
    )
    return EXIT_OK


def cmd_replay(args: argparse.Namespace) -> int:

    text = None
    if args.policy:
        try:
            text = Path(args.policy).read_text("utf-8")
        except OSError as exc:
            print(f"error: cannot read {args.policy}: {exc}", file=sys.stderr)
            return EXIT_ERROR
    result = _remote(args, lambda client: client.replay(args.model, text, args.limit))
    if result is None:
        return EXIT_ERROR
    if args.json:
        _print_json(result)
        return EXIT_OK
    s = result["summary"]
    print(f"{result['model']} replayed under {result['policy']} ({result['policy_digest']})")
    print(
        f"  {s['snapshots']} snapshots: held then {s['held_then']}, held by replay "
        f"{s['held_by_replay']}, changed {s['changed']}; overridden holds still held "
        f"{s['overridden_holds_still_held']}; samples pruned {s['samples_pruned']}"
    )
    for row in result["data"]:
        if row["changed"]:
            reason = row["replay_reasons"][0] if row["replay_reasons"] else ""
            print(f"  {row['snapshot']:<24} {row['decision']} -> {row['replay_decision']} {reason}")
    return EXIT_OK


def cmd_reference(args: argparse.Namespace) -> int:

    snapshot = args.snapshot if args.reference_action == "pin" else None
    result = _remote(args, lambda client: client.set_reference(args.model, snapshot, args.reason))
    if result is None:
        return EXIT_ERROR
    if args.json:
        _print_json(result)
        return EXIT_OK
    now = result["reference"] or "none pinned (the policy's lag_hours applies, if set)"
    print(f"{result['model']}: reference is now {now} (was {result['previous'] or 'none'})")
    return EXIT_OK


def cmd_models(args: argparse.Namespace) -> int:
    from service.gate.history import format_age

    models = _remote(args, lambda client: client.models())
    if models is None:
        return EXIT_ERROR
    if args.json:
        _print_json(models)
        return EXIT_OK
    for m in models:
        last = m["last_verdict"]["decision"] if m["last_verdict"] else "-"
        age = m["baseline_age_seconds"]
        serving = f"{m['baseline'] or '-'} ({format_age(age)} ago)" if age is not None else "-"
        state = "STUCK: " + m["stuck"]["message"] if m["stuck"]["stuck"] else ""
        print(f"{m['name']:<20} baseline {serving:<36} last {last:<8} {state}".rstrip())
    return EXIT_OK


def cmd_override(args: argparse.Namespace) -> int:

    result = _remote(args, lambda client: client.override(args.verdict, args.decision, args.reason))
    if result is None:
        return EXIT_ERROR
    if args.json:
        _print_json(result)
        return EXIT_OK
    v, o = result["verdict"], result["override"]
    print(
        f"{v['model']} {v['snapshot']} (verdict {v['verdict_id']}): "
        f"{result['decision_before']} -> {o['decision']} by {o['actor']} at {o['created_at']}"
    )
    print(
        f"baseline: {result['baseline_before'] or 'none'} -> {result['baseline_after'] or 'none'}"
        f"{'' if result['baseline_moved'] else ' (unchanged)'}"
    )
    print(result["note"])
    return EXIT_OK


def cmd_rollback(args: argparse.Namespace) -> int:

    result = _remote(args, lambda client: client.rollback(args.model, args.snapshot, args.reason))
    if result is None:
        return EXIT_ERROR
    if args.json:
        _print_json(result)
        return EXIT_OK
    print(
        f"{result['model']}: baseline is now {result['baseline']} "
        f"(was {result['previous'] or 'none'}; {result['cause']})"
    )
    return EXIT_OK


def _state(value: dict[str, Any] | None) -> str:
    if not value:
        return "-"
    return (
        ", ".join(
            f"{k} {value[k] if value[k] is not None else 'none'}"
            for k in ("decision", "baseline", "reference")
            if k in value
        )
        or "-"
    )


def cmd_audit(args: argparse.Namespace) -> int:

    page = _remote(
        args, lambda client: client.audit(model=args.model, limit=args.limit, cursor=args.cursor)
    )
    if page is None:
        return EXIT_ERROR
    if args.json:
        _print_json(page)
        return EXIT_OK
    for a in page["data"]:
        print(
            f"{a['id']:>6}  {a['at']}  {a['actor']:<16} {a['action']:<18} "
            f"{a['model'] or '-'}  {a['target'] or ''}"
        )
        print(
            f"        {_state(a['before'])} -> {_state(a['after'])}"
            + (f"; reason: {a['reason']}" if a["reason"] else "")
        )
    if page.get("next_cursor"):
        print(
            f"more: tidegate audit --cursor {page['next_cursor']}"
            + (f" --model {args.model}" if args.model else "")
        )
    return EXIT_OK


# --- wiring ---------------------------------------------------------------------------------


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(prog="tidegate", description=__doc__.splitlines()[0])
    sub = parser.add_subparsers(dest="command", required=True)

    def remote(p: argparse.ArgumentParser) -> None:
        p.add_argument(
            "--url",
            default=None,
            help="service URL (env TIDEGATE_URL; default http://127.0.0.1:8080)",
        )
        p.add_argument("--token", default=None, help="API token (env TIDEGATE_TOKEN)")
        p.add_argument("--json", action="store_true", help="print JSON instead of text")

    p = sub.add_parser("serve", help="run the HTTP service")
    p.add_argument("--host", default="127.0.0.1")
    p.add_argument("--port", type=int, default=8080)
    p.add_argument("--open", action="store_true", help="open mode: no tokens (local use only)")
    p.add_argument(
        "--workers",
        type=int,
        default=1,
        help="worker processes (use PostgreSQL for more than one instance)",
    )
    p.set_defaults(func=cmd_serve)

    p = sub.add_parser("db", help="database migrations: upgrade, downgrade, current")
    p.add_argument("action", choices=["upgrade", "downgrade", "current"])
    p.add_argument("revision", nargs="?", default=None)
    p.set_defaults(func=cmd_db)

    p = sub.add_parser("token", help="API tokens: create, list, revoke (on the database)")
    tsub = p.add_subparsers(dest="token_action", required=True)
    t = tsub.add_parser("create", help="make a token; its text is printed once")
    t.add_argument("--role", required=True, choices=["viewer", "trainer", "operator", "admin"])
    t.add_argument(
        "--models",
        action="append",
        default=None,
        help="model patterns in scope, comma-separated or repeated (default '*')",
    )
    t.add_argument("--label", default="", help="a name for the audit log")
    t.add_argument("--json", action="store_true")
    t.set_defaults(func=cmd_token)
    t = tsub.add_parser("list", help="the live tokens (never their text)")
    t.add_argument("--all", action="store_true", help="include revoked tokens")
    t.add_argument("--json", action="store_true")
    t.set_defaults(func=cmd_token)
    t = tsub.add_parser("revoke", help="revoke a token by id, prefix or label")
    t.add_argument("ref")
    t.set_defaults(func=cmd_token)

    p = sub.add_parser("prune", help="delete old raw samples (keeps summaries and verdicts)")
    p.add_argument(
        "--days",
        type=int,
        default=None,
        help="prune samples older than N days (default TIDEGATE_RETENTION_DAYS)",
    )
    p.add_argument(
        "--dry-run", action="store_true", help="say what would be pruned, change nothing"
    )
    p.add_argument("--json", action="store_true")
    p.set_defaults(func=cmd_prune)

    p = sub.add_parser("policy", help="policies: check the policy folder")
    p.add_argument("action", choices=["check"])
    p.add_argument("folder", nargs="?", default=None)
    p.set_defaults(func=cmd_policy_check)

    p = sub.add_parser(
        "submit", help="post a snapshot from a JSON file; exit 0 promote, 3 hold, 4 error"
    )
    p.add_argument("file", help="JSON file with the snapshot (- for standard input)")
    p.add_argument("--model", default=None)
    remote(p)
    p.set_defaults(func=cmd_submit)

    p = sub.add_parser("why", help="explain the latest (or a given) verdict of a model")
    p.add_argument("model")
    p.add_argument("snapshot", nargs="?", default=None)
    remote(p)
    p.set_defaults(func=cmd_why)

    p = sub.add_parser("history", help="a model's verdicts, newest first")
    p.add_argument("model")
    p.add_argument("--limit", type=int, default=20)
    p.add_argument("--decision", choices=["promote", "hold"], default=None)
    remote(p)
    p.set_defaults(func=cmd_history)

    p = sub.add_parser("baseline", help="set the baseline by hand (promote or roll back)")
    bsub = p.add_subparsers(dest="baseline_action", required=True)
    b = bsub.add_parser("set", help="make SNAPSHOT the baseline of MODEL")
    b.add_argument("model")
    b.add_argument("snapshot")
    b.add_argument("--reason", required=True)
    remote(b)
    b.set_defaults(func=cmd_baseline_set)

    p = sub.add_parser("replay", help="judge a model's past snapshots again under a policy")
    p.add_argument("model")
    p.add_argument("--policy", default=None, help="policy TOML file (default: the one in force)")
    p.add_argument("--limit", type=int, default=100)
    remote(p)
    p.set_defaults(func=cmd_replay)

    p = sub.add_parser("reference", help="pin or unpin a model's reference snapshot")
    rsub = p.add_subparsers(dest="reference_action", required=True)
    r = rsub.add_parser("pin", help="make SNAPSHOT the reference of MODEL")
    r.add_argument("model")
    r.add_argument("snapshot")
    r.add_argument("--reason", required=True)
    remote(r)
    r.set_defaults(func=cmd_reference)
    r = rsub.add_parser("unpin", help="drop MODEL's pinned reference (lag_hours applies again)")
    r.add_argument("model")
    r.add_argument("--reason", required=True)
    remote(r)
    r.set_defaults(func=cmd_reference)

    p = sub.add_parser("models", help="every model: its baseline, last verdict, stuck or not")
    remote(p)
    p.set_defaults(func=cmd_models)

    p = sub.add_parser("override", help="override a verdict's decision, with a reason")
    p.add_argument("verdict", type=int, help="verdict id (tidegate history shows them)")
    p.add_argument("--decision", choices=["promote", "hold"], required=True)
    p.add_argument("--reason", required=True)
    remote(p)
    p.set_defaults(func=cmd_override)

    p = sub.add_parser("rollback", help="make an earlier snapshot the baseline again")
    p.add_argument("model")
    p.add_argument("snapshot")
    p.add_argument("--reason", required=True)
    remote(p)
    p.set_defaults(func=cmd_rollback)

    p = sub.add_parser("audit", help="the audit log, newest first")
    p.add_argument("--model", default=None)
    p.add_argument("--limit", type=int, default=20)
    p.add_argument("--cursor", default=None, help="continue from an earlier page")
    remote(p)
    p.set_defaults(func=cmd_audit)

    p = sub.add_parser("demo", help="load the invented bookshop scenario and serve it")
    p.add_argument("--db", default="tidegate-demo.db", help="SQLite file (recreated)")
    p.add_argument("--policies", default="config/policies")
    p.add_argument("--hours", type=int, default=36)
    p.add_argument("--host", default="127.0.0.1")
    p.add_argument("--port", type=int, default=8080)
    p.add_argument("--no-serve", action="store_true", help="load the data, then exit")
    p.set_defaults(func=cmd_demo)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    logging.basicConfig(
        level=logging.WARNING, format="%(asctime)s %(levelname)s %(name)s %(message)s"
    )
    args = build_parser().parse_args(argv)
    try:
        return int(args.func(args))
    except KeyboardInterrupt:
        return EXIT_OK
    except Exception as exc:  # a clear message, not a traceback, for operator errors
        from service.gate.policy import PolicyError
        from service.store.db import DatabaseNotReady

        if isinstance(exc, (PolicyError, DatabaseNotReady)):
            print(f"error: {exc}", file=sys.stderr)
            return EXIT_ERROR
        raise


if __name__ == "__main__":
    sys.exit(main())

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
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

EXIT_OK = 0
EXIT_HOLD = 3
EXIT_ERROR = 4


def _client(args: argparse.Namespace) -> Any:
    from service.client import TidegateClient

    return TidegateClient(args.url, token=args.token)


def _print_json(data: Any) -> None:
    print(json.dumps(data, indent=2, sort_keys=False))


# --- service and database -------------------------------------------------------------------


def cmd_serve(args: argparse.Namespace) -> int:
    import os

    import uvicorn

    from service import logs
    from service.app import create_app
    from service.settings import Settings

    overrides: dict[str, Any] = {}
    if args.open:
        overrides["auth"] = "open"
        os.environ["TIDEGATE_AUTH"] = "open"  # for worker processes
    settings = Settings(**overrides)
    logs.configure(settings.log_level)
    if settings.auth == "open":
        print(
            "WARNING: tidegate runs in OPEN mode: no API tokens are checked. Use it for the demo "
            "and local development only.",
            file=sys.stderr,
        )
    # Built here even with several workers: the database is checked (or migrated) once, and a
    # bad policy or an old database is reported before any worker starts.
    app = create_app(settings)
    common: dict[str, Any] = {
        "host": args.host,
        "port": args.port,
        "log_config": logs.log_config(settings.log_level),
        "access_log": False,
        "timeout_graceful_shutdown": settings.shutdown_grace_seconds,
    }
    if args.workers > 1:
        os.environ["TIDEGATE_MIGRATE_ON_START"] = "false"
        app.state.engine.dispose()
        uvicorn.run("service.asgi:app_from_environment", factory=True, workers=args.workers,
                    **common)
    else:
        uvicorn.run(app, **common)
    return EXIT_OK


def cmd_db(args: argparse.Namespace) -> int:
    from service.settings import Settings
    from service.store import db

    settings = Settings()
    if args.action == "upgrade":
        db.upgrade(settings, args.revision or "head")
    elif args.action == "downgrade":
        if not args.revision:
            print("downgrade needs a revision (e.g. base)", file=sys.stderr)
            return EXIT_ERROR
        db.downgrade(settings, args.revision)
    engine = db.make_engine(settings)
    print(f"database: {engine.url.render_as_string(hide_password=True)}")
    print(f"revision: {db.current_revision(engine) or 'none'} (head {db.head_revision(settings)})")
    print(f"storage:  {db.storage_settings(engine)}")
    return EXIT_OK


def cmd_policy_check(args: argparse.Namespace) -> int:
    from service.gate.policy import PolicyError, load_policies
    from service.settings import Settings

    folder = Path(args.folder) if args.folder else Settings().policy_dir
    try:
        policies = load_policies(folder)
    except PolicyError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return EXIT_ERROR
    for p in policies:
        print(f"{p.name}: models {', '.join(p.models)}; {len(p.checks)} checks; {p.digest}")
    return EXIT_OK


def _store() -> tuple[Any, Any]:
    """(settings, sessionmaker) of the database in ``TIDEGATE_DATABASE_URL``, which must be at
    the current revision."""
    from service.settings import Settings
    from service.store import db

    settings = Settings()
    engine = db.make_engine(settings)
    db.ensure_ready(settings.model_copy(update={"migrate_on_start": False}), engine)
    return settings, db.make_sessionmaker(engine)


def cmd_token(args: argparse.Namespace) -> int:
    """Tokens are managed on the database itself (no service call): this is how the first admin
    token is made. The token text is printed once and never stored."""
    from service.store import db, repo, tokens

    _, factory = _store()
    now = datetime.now(UTC)
    if args.token_action == "create":
        patterns = [p for chunk in (args.models or ["*"]) for p in chunk.split(",")]
        try:
            with db.transaction(factory) as session:
                made = tokens.create_token(session, role=args.role, models=patterns,
                                           label=args.label or "", now=now)
                repo.add_audit(session, actor="cli", action="token.create", model=None,
                               target=made.prefix, before=None,
                               after={"role": made.role, "models": list(made.models),
                                      "label": made.label}, reason="", now=now)
        except ValueError as exc:
            print(f"error: {exc}", file=sys.stderr)
            return EXIT_ERROR
        if args.json:
            _print_json({"id": made.id, "token": made.secret, "prefix": made.prefix,
                         "role": made.role, "models": list(made.models), "label": made.label})
        else:
            print(made.secret)
            print(f"token {made.id} ({made.label}): role {made.role}, models "
                  f"{', '.join(made.models)}. It is shown this once: store it now.",
                  file=sys.stderr)
        return EXIT_OK
    if args.token_action == "list":
        with db.read_transaction(factory) as session:
            rows = tokens.list_tokens(session, include_revoked=args.all)
            from service.api.routers.tokens import token_view

            views: list[dict[str, Any]] = [token_view(row) for row in rows]
        if args.json:
            _print_json(views)
            return EXIT_OK
        for v in views:
            state = f"revoked {v['revoked_at']}" if v["revoked_at"] else (
                f"last used {v['last_used_at'] or 'never'}")
            print(f"{v['id']:>4}  {v['prefix']}…  {v['role']:<8}  {','.join(v['models']):<20} "
                  f"{v['label']:<20} {state}")
        return EXIT_OK
    # revoke
    with db.transaction(factory) as session:
        try:
            row = tokens.resolve_ref(session, ref=args.ref)
        except ValueError as exc:
            print(f"error: {exc}", file=sys.stderr)
            return EXIT_ERROR
        if row is None:
            print(f"error: no token {args.ref!r} (give its id, prefix or label)", file=sys.stderr)
            return EXIT_ERROR
        changed = tokens.revoke_token(session, token=row, now=now)
        if changed:
            repo.add_audit(session, actor="cli", action="token.revoke", model=None,
                           target=row.prefix, before={"revoked": False},
                           after={"revoked": True}, reason="", now=now)
        label = f"{row.id} ({row.label})"
    print(f"token {label} {'revoked' if changed else 'was already revoked'}")
    return EXIT_OK


def cmd_prune(args: argparse.Namespace) -> int:
    from service.store import db, retention

    settings, factory = _store()
    days = args.days if args.days is not None else settings.retention_days
    if days is None:
        print("error: give --days N or set TIDEGATE_RETENTION_DAYS", file=sys.stderr)
        return EXIT_ERROR
    if days < 1:
        print("error: --days must be at least 1", file=sys.stderr)
        return EXIT_ERROR
    now = datetime.now(UTC)
    with db.transaction(factory) as session:
        plan = retention.prune(session, cutoff=now - timedelta(days=days), now=now,
                               dry_run=args.dry_run)
    summary = plan.to_dict()
    if args.json:
        _print_json({**summary, "dry_run": args.dry_run})
        return EXIT_OK
    verb = "would prune" if args.dry_run else "pruned"
    print(f"{verb} the raw samples of {summary['snapshots_pruned']} snapshots older than "
          f"{days} days ({summary['sample_columns']} columns, {summary['sample_bytes']} bytes); "
          f"kept {summary['kept_baseline']} baselines, {summary['kept_reference']} references, "
          f"{summary['kept_unresolved_hold']} unresolved holds. Summaries and verdicts are kept.")
    return EXIT_OK


# --- the retraining job ---------------------------------------------------------------------


def cmd_submit(args: argparse.Namespace) -> int:
    from service.client import ClientError
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
        print("error: give --model or a \"model\" field in the file", file=sys.stderr)
        return EXIT_ERROR
    try:
        with _client(args) as client:
            verdict = client.post_snapshot(model, body)
    except ClientError as exc:
        print(f"error: {exc}", file=sys.stderr)
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
    from service.client import ClientError

    try:
        with _client(args) as client:
            page = client.verdicts(args.model, limit=args.limit, decision=args.decision)
    except ClientError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return EXIT_ERROR
    if args.json:
        _print_json(page)
        return EXIT_OK
    for v in page["data"]:
        flag = " (overridden to " + v["effective_decision"] + ")" if v["overridden"] else ""
        reason = v["reasons"][0] if v["reasons"] else ""
        print(f"{v['verdict_id']:>6}  {v['created_at']}  {v['snapshot']:<24} "
              f"{v['decision']:<8}{flag} {reason}")
    return EXIT_OK


def cmd_baseline_set(args: argparse.Namespace) -> int:
    from service.client import ClientError

    try:
        with _client(args) as client:
            result = client.set_baseline(args.model, args.snapshot, args.reason)
    except ClientError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return EXIT_ERROR
    print(f"{result['model']}: baseline is now {result['baseline']} "
          f"(was {result['previous'] or 'none'}; {result['cause']})")
    return EXIT_OK


def cmd_replay(args: argparse.Namespace) -> int:
    from service.client import ClientError

    text = None
    if args.policy:
        try:
            text = Path(args.policy).read_text("utf-8")
        except OSError as exc:
            print(f"error: cannot read {args.policy}: {exc}", file=sys.stderr)
            return EXIT_ERROR
    try:
        with _client(args) as client:
            result = client.replay(args.model, text, args.limit)
    except ClientError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return EXIT_ERROR
    if args.json:
        _print_json(result)
        return EXIT_OK
    s = result["summary"]
    print(f"{result['model']} replayed under {result['policy']} ({result['policy_digest']})")
    print(f"  {s['snapshots']} snapshots: held then {s['held_then']}, held by replay "
          f"{s['held_by_replay']}, changed {s['changed']}; overridden holds still held "
          f"{s['overridden_holds_still_held']}; samples pruned {s['samples_pruned']}")
    for row in result["data"]:
        if row["changed"]:
            reason = row["replay_reasons"][0] if row["replay_reasons"] else ""
            print(f"  {row['snapshot']:<24} {row['decision']} -> {row['replay_decision']} {reason}")
    return EXIT_OK


def cmd_reference(args: argparse.Namespace) -> int:
    from service.client import ClientError

    snapshot = args.snapshot if args.reference_action == "pin" else None
    try:
        with _client(args) as client:
            result = client.set_reference(args.model, snapshot, args.reason)
    except ClientError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return EXIT_ERROR
    if args.json:
        _print_json(result)
        return EXIT_OK
    now = result["reference"] or "none pinned (the policy's lag_hours applies, if set)"
    print(f"{result['model']}: reference is now {now} (was {result['previous'] or 'none'})")
    return EXIT_OK


def cmd_models(args: argparse.Namespace) -> int:
    from service.client import ClientError
    from service.gate.history import format_age

    try:
        with _client(args) as client:
            models = client.models()
    except ClientError as exc:
        print(f"error: {exc}", file=sys.stderr)
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
    from service.client import ClientError

    try:
        with _client(args) as client:
            result = client.override(args.verdict, args.decision, args.reason)
    except ClientError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return EXIT_ERROR
    if args.json:
        _print_json(result)
        return EXIT_OK
    v, o = result["verdict"], result["override"]
    print(f"{v['model']} {v['snapshot']} (verdict {v['verdict_id']}): "
          f"{result['decision_before']} -> {o['decision']} by {o['actor']} at {o['created_at']}")
    print(f"baseline: {result['baseline_before'] or 'none'} -> {result['baseline_after'] or 'none'}"
          f"{'' if result['baseline_moved'] else ' (unchanged)'}")
    print(result["note"])
    return EXIT_OK


def cmd_rollback(args: argparse.Namespace) -> int:
    from service.client import ClientError

    try:
        with _client(args) as client:
            result = client.rollback(args.model, args.snapshot, args.reason)
    except ClientError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return EXIT_ERROR
    if args.json:
        _print_json(result)
        return EXIT_OK
    print(f"{result['model']}: baseline is now {result['baseline']} "
          f"(was {result['previous'] or 'none'}; {result['cause']})")
    return EXIT_OK


def _state(value: dict[str, Any] | None) -> str:
    if not value:
        return "-"
    return ", ".join(f"{k} {value[k] if value[k] is not None else 'none'}"
                     for k in ("decision", "baseline", "reference") if k in value) or "-"


def cmd_audit(args: argparse.Namespace) -> int:
    from service.client import ClientError

    try:
        with _client(args) as client:
            page = client.audit(model=args.model, limit=args.limit, cursor=args.cursor)
    except ClientError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return EXIT_ERROR
    if args.json:
        _print_json(page)
        return EXIT_OK
    for a in page["data"]:
        print(f"{a['id']:>6}  {a['at']}  {a['actor']:<16} {a['action']:<18} "
              f"{a['model'] or '-'}  {a['target'] or ''}")
        print(f"        {_state(a['before'])} -> {_state(a['after'])}"
              + (f"; reason: {a['reason']}" if a["reason"] else ""))
    if page.get("next_cursor"):
        print(f"more: tidegate audit --cursor {page['next_cursor']}"
              + (f" --model {args.model}" if args.model else ""))
    return EXIT_OK


# --- demo -----------------------------------------------------------------------------------


def cmd_demo(args: argparse.Namespace) -> int:
    import warnings

    with warnings.catch_warnings():  # the in-process client's transport notice is noise here
        warnings.simplefilter("ignore")
        from fastapi.testclient import TestClient

    from service import demo
    from service.app import create_app
    from service.settings import Settings
    from service.store import db

    path = Path(args.db)
    for suffix in ("", "-wal", "-shm"):
        Path(str(path) + suffix).unlink(missing_ok=True)
    settings = Settings(
        database_url=f"sqlite:///{path}", auth="open", policy_dir=Path(args.policies)
    )
    db.upgrade(settings)
    end = datetime.now(UTC).replace(second=0, microsecond=0)
    end -= timedelta(minutes=end.minute % 15)
    events = demo.scenario(end, hours=args.hours)
    clock = {"now": end}
    app = create_app(settings, clock=lambda: clock["now"])
    print(f"loading the Bramble & Page demo: {len(events)} snapshots into {path} ...")
    with TestClient(app) as http:

        def post(event: demo.DemoEvent) -> dict[str, Any]:
            clock["now"] = event.at + timedelta(seconds=40)
            response = http.post(f"/v1/models/{event.model}/snapshots", json=event.body)
            if response.status_code >= 300:
                raise RuntimeError(f"demo post failed: {response.status_code} {response.text}")
            return response.json()  # type: ignore[no-any-return]

        counts = demo.load(post, events)
    print(f"demo loaded: {counts['promote']} promoted, {counts['hold']} held")
    if args.no_serve:
        return EXIT_OK
    import uvicorn

    print(
        "WARNING: the demo runs in OPEN mode: no API tokens are checked.\n"
        f"tidegate demo on http://{args.host}:{args.port}/  (API docs at /docs; Ctrl-C stops)",
        file=sys.stderr,
    )
    uvicorn.run(create_app(settings), host=args.host, port=args.port, log_level="warning")
    return EXIT_OK


# --- wiring ---------------------------------------------------------------------------------


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(prog="tidegate", description=__doc__.splitlines()[0])
    sub = parser.add_subparsers(dest="command", required=True)

    def remote(p: argparse.ArgumentParser) -> None:
        p.add_argument("--url", default=None, help="service URL (env TIDEGATE_URL; "
                       "default http://127.0.0.1:8080)")
        p.add_argument("--token", default=None, help="API token (env TIDEGATE_TOKEN)")
        p.add_argument("--json", action="store_true", help="print JSON instead of text")

    p = sub.add_parser("serve", help="run the HTTP service")
    p.add_argument("--host", default="127.0.0.1")
    p.add_argument("--port", type=int, default=8080)
    p.add_argument("--open", action="store_true", help="open mode: no tokens (local use only)")
    p.add_argument("--workers", type=int, default=1,
                   help="worker processes (use PostgreSQL for more than one instance)")
    p.set_defaults(func=cmd_serve)

    p = sub.add_parser("db", help="database migrations: upgrade, downgrade, current")
    p.add_argument("action", choices=["upgrade", "downgrade", "current"])
    p.add_argument("revision", nargs="?", default=None)
    p.set_defaults(func=cmd_db)

    p = sub.add_parser("token", help="API tokens: create, list, revoke (on the database)")
    tsub = p.add_subparsers(dest="token_action", required=True)
    t = tsub.add_parser("create", help="make a token; its text is printed once")
    t.add_argument("--role", required=True, choices=["viewer", "trainer", "operator", "admin"])
    t.add_argument("--models", action="append", default=None,
                   help="model patterns in scope, comma-separated or repeated (default '*')")
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
    p.add_argument("--days", type=int, default=None,
                   help="prune samples older than N days (default TIDEGATE_RETENTION_DAYS)")
    p.add_argument("--dry-run", action="store_true", help="say what would be pruned, change "
                   "nothing")
    p.add_argument("--json", action="store_true")
    p.set_defaults(func=cmd_prune)

    p = sub.add_parser("policy", help="policies: check the policy folder")
    p.add_argument("action", choices=["check"])
    p.add_argument("folder", nargs="?", default=None)
    p.set_defaults(func=cmd_policy_check)

    p = sub.add_parser("submit", help="post a snapshot from a JSON file; exit 0 promote, "
                       "3 hold, 4 error")
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

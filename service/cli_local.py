"""``tidegate`` commands that work on this machine's database and files: serve, db, policy,
token, prune and demo (the others call a running service; see :mod:`service.cli`)."""

from __future__ import annotations

import argparse
import json
import sys
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

EXIT_OK = 0
EXIT_ERROR = 4


def print_json(data: Any) -> None:
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
        uvicorn.run(
            "service.asgi:app_from_environment", factory=True, workers=args.workers, **common
        )
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
    from service.gate.policy import PolicyError, policies_for
    from service.settings import Settings

    folder = Path(args.folder) if args.folder else Settings().policy_dir
    try:
        policies = policies_for(folder)
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
    from service.store import db, tokens

    _, factory = _store()
    now = datetime.now(UTC)
    if args.token_action == "create":
        patterns = [p for chunk in (args.models or ["*"]) for p in chunk.split(",")]
        try:
            with db.transaction(factory) as session:
                made = tokens.create_token(
                    session,
                    role=args.role,
                    models=patterns,
                    label=args.label or "",
                    actor="cli",
                    now=now,
                )
        except ValueError as exc:
            print(f"error: {exc}", file=sys.stderr)
            return EXIT_ERROR
        if args.json:
            print_json(
                {
                    "id": made.id,
                    "token": made.secret,
                    "prefix": made.prefix,
                    "role": made.role,
                    "models": list(made.models),
                    "label": made.label,
                }
            )
        else:
            print(made.secret)
            print(
                f"token {made.id} ({made.label}): role {made.role}, models "
                f"{', '.join(made.models)}. It is shown this once: store it now.",
                file=sys.stderr,
            )
        return EXIT_OK
    if args.token_action == "list":
        with db.read_transaction(factory) as session:
            rows = tokens.list_tokens(session, include_revoked=args.all)
            from service.views import token_view

            views: list[dict[str, Any]] = [token_view(row) for row in rows]
        if args.json:
            print_json(views)
            return EXIT_OK
        from service.cli_table import moment, print_table

        table: list[list[object]] = []
        for v in views:
            state = (
                f"revoked {moment(v['revoked_at'])}"
                if v["revoked_at"]
                else (f"last used {moment(v['last_used_at']) if v['last_used_at'] else 'never'}")
            )
            table.append(
                [v["id"], f"{v['prefix']}…", v["role"], ",".join(v["models"]), v["label"], state]
            )
        print_table(["id", "prefix", "role", "models", "label", "state"], table)
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
        changed = tokens.revoke_token(session, token=row, actor="cli", now=now)
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
        plan = retention.prune(
            session, cutoff=now - timedelta(days=days), now=now, dry_run=args.dry_run
        )
    summary = plan.to_dict()
    if args.json:
        print_json({**summary, "dry_run": args.dry_run})
        return EXIT_OK
    verb = "would prune" if args.dry_run else "pruned"
    print(
        f"{verb} the raw samples of {summary['snapshots_pruned']} snapshots older than "
        f"{days} days ({summary['sample_columns']} columns, {summary['sample_bytes']} bytes); "
        f"kept {summary['kept_baseline']} baselines, {summary['kept_reference']} references, "
        f"{summary['kept_unresolved_hold']} unresolved holds. Summaries and verdicts are kept."
    )
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

"""tidegate: the release gate between a retraining job and the fleet that serves its model.

The retraining job posts each snapshot and its scores (submit), and a deploy step ships what
serves (serving, wait). On-call reads why a push was held (why, history, models, audit) and
overrides or rolls back with a reason. On the service's own machine: serve, db, token, policy,
prune, demo.

Exit codes. submit: 0 the snapshot serves now (promoted by the gate, or by an operator since),
3 it does not serve (held), 4 rejected (a 4xx answer, or an unreadable file), 5 the service was
unreachable after every retry. wait: 0 serves, 3 can no longer serve (a newer snapshot serves),
5 timeout. serving: 0, or 3 when nothing serves yet. Other commands: 0 done, 4 error,
5 unreachable; 2 is a usage error.
"""

from __future__ import annotations

import argparse
import json
import logging
import os
import sys
from collections.abc import Callable, Sequence
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
from service.cli_table import format_table, moment, print_table

EXIT_OK = 0
EXIT_HOLD = 3
EXIT_ERROR = 4
EXIT_REJECTED = 4
EXIT_UNREACHABLE = 5

EPILOG = """\
Commands that call the service take --url (env TIDEGATE_URL, default http://127.0.0.1:8080),
--token (env TIDEGATE_TOKEN), --actor (env TIDEGATE_ACTOR: your name in the audit log when the
service runs in open mode), --timeout, --retries and --json. "tidegate COMMAND --help" tells
more about each command.
"""


def _client(args: argparse.Namespace) -> Any:
    from tidegate_client import Client

    return Client(
        args.url,
        token=args.token,
        actor=args.actor,
        timeout=args.timeout,
        retries=args.retries,
        upload=getattr(args, "upload", "auto"),
    )


def _failure(exc: Exception) -> int:
    """Print a client error; its exit code (4 rejected, 5 unreachable)."""
    from tidegate_client import Unreachable

    if isinstance(exc, Unreachable):
        print(f"error: unreachable: {exc}", file=sys.stderr)
        return EXIT_UNREACHABLE
    print(f"error: {exc}", file=sys.stderr)
    return EXIT_REJECTED


class _Failed(int):
    """The exit code of a failed call (so callers can tell it from an answer)."""


def _remote(args: argparse.Namespace, call: Callable[[Any], Any]) -> Any:
    """``call(client)`` against the service; on failure prints the error and returns its exit
    code as a :class:`_Failed`."""
    from tidegate_client import TidegateError

    try:
        with _client(args) as client:
            return call(client)
    except TidegateError as exc:
        return _Failed(_failure(exc))


# --- the retraining job ---------------------------------------------------------------------


def read_sample_file(path: str) -> Any:
    """A sample file as a pyarrow Table: Parquet (``.parquet``, ``.pq``), Arrow IPC (stream
    or file: ``.arrow``, ``.arrows``, ``.feather``, ``.ipc``) or CSV (``.csv``)."""
    import pyarrow as pa
    import pyarrow.csv as pa_csv
    import pyarrow.feather as feather
    import pyarrow.parquet as pq

    suffix = Path(path).suffix.lower()
    if suffix in (".parquet", ".pq"):
        return pq.read_table(path)
    if suffix in (".arrow", ".arrows", ".feather", ".ipc"):
        try:
            with pa.OSFile(path, "rb") as source:
                return pa.ipc.open_stream(source).read_all()
        except pa.ArrowInvalid:
            return feather.read_table(path)
    if suffix == ".csv":
        return pa_csv.read_csv(path)
    raise ValueError("the sample file must end in .parquet, .arrow, .arrows, .feather or .csv")


def _read_post(args: argparse.Namespace) -> tuple[dict[str, Any], Any]:
    text = sys.stdin.read() if args.file == "-" else Path(args.file).read_text("utf-8")
    body = json.loads(text)
    if not isinstance(body, dict):
        raise ValueError("the file must hold one JSON object")
    sample = None
    if args.sample:
        if "sample" in body:
            raise ValueError("give the sample either inside the JSON file or with --sample")
        try:
            sample = read_sample_file(args.sample)
        except Exception as exc:  # pyarrow's errors have no common base
            raise ValueError(f"cannot read {args.sample}: {exc}") from exc
    return body, sample


def cmd_submit(args: argparse.Namespace) -> int:
    from service.explain import explain

    try:
        body, sample = _read_post(args)
    except (OSError, ValueError) as exc:
        print(f"error: cannot read {args.file}: {exc}", file=sys.stderr)
        return EXIT_REJECTED
    model = args.model or body.pop("model", None)
    body.pop("model", None)
    if not model:
        print('error: give --model or a "model" field in the file', file=sys.stderr)
        return EXIT_REJECTED
    verdict = _remote(args, lambda client: client.post_snapshot(model, body, sample=sample))
    if isinstance(verdict, _Failed):
        return int(verdict)
    code = EXIT_OK if verdict.serves_now else EXIT_HOLD

    def show() -> None:
        if args.json:
            _print_json(verdict.raw)
        else:
            print(explain(verdict.raw, ascii_only=_ascii_only()))
            state = "serves now" if verdict.serves_now else "does not serve"
            print(f"{verdict.snapshot} {state} (exit {code}); {verdict.link}")

    return _print_then(code, show)


def _print_then(code: int, show: Callable[[], None]) -> int:
    """Run *show* and return *code*, even when the reader of standard output went away: the
    exit code of submit, serving and wait is the answer itself and must never be lost."""
    try:
        show()
        sys.stdout.flush()
    except BrokenPipeError:
        _quiet_stdout()
    return code


def cmd_serving(args: argparse.Namespace) -> int:
    serving = _remote(args, lambda client: client.serving(args.model))
    if isinstance(serving, _Failed):
        return int(serving)
    if args.json:
        return _print_then(EXIT_OK, lambda: _print_json(serving.raw))
    if serving.snapshot is None:
        print(f"error: nothing serves for model {args.model!r} yet", file=sys.stderr)
        return EXIT_HOLD
    return _print_then(EXIT_OK, lambda: print(serving.snapshot))


def cmd_wait(args: argparse.Namespace) -> int:
    result = _remote(
        args,
        lambda client: client.wait(
            args.model, args.snapshot, timeout=args.wait_timeout, interval=args.interval
        ),
    )
    if isinstance(result, _Failed):
        return int(result)
    code = {"serves": EXIT_OK, "superseded": EXIT_HOLD}.get(result.state, EXIT_UNREACHABLE)
    return _print_then(code, lambda: _report_wait(args, result))


def _report_wait(args: argparse.Namespace, result: Any) -> None:
    serving = result.serving
    if args.json:
        _print_json(
            {
                "state": result.state,
                "polls": result.polls,
                "serving": serving.raw if serving else None,
            }
        )
    elif result.state == "serves":
        print(args.snapshot)
    elif result.state == "superseded":
        assert serving is not None
        print(
            f"{args.snapshot} can no longer serve: {serving.snapshot} serves "
            f"(since {moment(serving.raw.get('since'))}, by {serving.cause})",
            file=sys.stderr,
        )
    else:
        where = serving.asked_state if serving is not None else "unknown (no answer)"
        print(
            f"timed out after {args.wait_timeout:g} s: {args.snapshot} is {where}",
            file=sys.stderr,
        )


# --- on-call --------------------------------------------------------------------------------


def _find_verdict(client: Any, model: str, snapshot: str | None) -> dict[str, Any]:
    if snapshot is None:
        return client.latest_verdict(model)  # type: ignore[no-any-return]
    snap = client.snapshot(model, snapshot)
    if snap.get("verdict_id") is None:
        from tidegate_client import NotFound

        raise NotFound(
            status=404, code="not_found", message=f"snapshot {snapshot!r} has no verdict"
        )
    return client.verdict(snap["verdict_id"])  # type: ignore[no-any-return]


def cmd_why(args: argparse.Namespace) -> int:
    from service.explain import explain

    def both(client: Any) -> tuple[dict[str, Any], dict[str, Any]]:
        verdict = _find_verdict(client, args.model, args.snapshot)
        return verdict, client.evidence(verdict["verdict_id"])

    found = _remote(args, both)
    if isinstance(found, _Failed):
        return int(found)
    verdict, evidence = found
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
    if isinstance(page, _Failed):
        return int(page)
    if args.json:
        _print_json(page)
        return EXIT_OK
    rows = []
    for v in page["data"]:
        decision = v["decision"]
        if v["overridden"]:
            decision += f" (overridden to {v['effective_decision']})"
        reason = v["reasons"][0] if v["reasons"] else ""
        rows.append([v["verdict_id"], moment(v["created_at"]), v["snapshot"], decision, reason])
    if not rows:
        print(f"no verdicts for {args.model}", file=sys.stderr)
        return EXIT_OK
    print_table(["verdict", "judged at", "snapshot", "decision", "first reason"], rows)
    return EXIT_OK


def cmd_baseline_set(args: argparse.Namespace) -> int:

    result = _remote(
        args, lambda client: client.set_baseline(args.model, args.snapshot, args.reason)
    )
    if isinstance(result, _Failed):
        return int(result)
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
    if isinstance(result, _Failed):
        return int(result)
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
    if isinstance(result, _Failed):
        return int(result)
    if args.json:
        _print_json(result)
        return EXIT_OK
    now = result["reference"] or "none pinned (the policy's lag_hours applies, if set)"
    print(f"{result['model']}: reference is now {now} (was {result['previous'] or 'none'})")
    return EXIT_OK


def cmd_models(args: argparse.Namespace) -> int:
    from service.gate.history import format_age

    models = _remote(args, lambda client: client.models())
    if isinstance(models, _Failed):
        return int(models)
    if args.json:
        _print_json(models)
        return EXIT_OK
    rows = []
    for m in models:
        last = m["last_verdict"]["decision"] if m["last_verdict"] else "-"
        age = m["baseline_age_seconds"]
        serving = f"{m['baseline'] or '-'} ({format_age(age)} ago)" if age is not None else "-"
        rows.append([m["name"], serving, last, _stuck_text(m["stuck"])])
    print_table(["model", "baseline (serving)", "last verdict", "state"], rows)
    return EXIT_OK


def _stuck_text(stuck: dict[str, Any]) -> str:
    """``STUCK: 3 holds in a row; ...`` (the service's message starts with "stuck:" itself)."""
    if not stuck.get("stuck"):
        return ""
    message = str(stuck.get("message") or "").strip()
    if message.lower().startswith("stuck"):
        message = message[len("stuck") :].lstrip(" :")
    return "STUCK: " + message if message else "STUCK"


def cmd_override(args: argparse.Namespace) -> int:

    result = _remote(args, lambda client: client.override(args.verdict, args.decision, args.reason))
    if isinstance(result, _Failed):
        return int(result)
    if args.json:
        _print_json(result)
        return EXIT_OK
    v, o = result["verdict"], result["override"]
    print(
        f"{v['model']} {v['snapshot']} (verdict {v['verdict_id']}): "
        f"{result['decision_before']} -> {o['decision']} by {o['actor']} at "
        f"{moment(o['created_at'])}"
    )
    print(
        f"baseline: {result['baseline_before'] or 'none'} -> {result['baseline_after'] or 'none'}"
        f"{'' if result['baseline_moved'] else ' (unchanged)'}"
    )
    print(result["note"])
    return EXIT_OK


def cmd_rollback(args: argparse.Namespace) -> int:

    result = _remote(args, lambda client: client.rollback(args.model, args.snapshot, args.reason))
    if isinstance(result, _Failed):
        return int(result)
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
    if isinstance(page, _Failed):
        return int(page)
    if args.json:
        _print_json(page)
        return EXIT_OK
    lines = format_table(
        ["id", "at", "actor", "action", "model", "target"],
        [
            [a["id"], moment(a["at"]), a["actor"], a["action"], a["model"], a["target"]]
            for a in page["data"]
        ],
    )
    print(lines[0])
    for a, line in zip(page["data"], lines[1:], strict=True):
        print(line)
        print(
            f"      {_state(a['before'])} -> {_state(a['after'])}"
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
    parser = argparse.ArgumentParser(
        prog="tidegate",
        description=__doc__,
        epilog=EPILOG,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")

    def remote(p: argparse.ArgumentParser, *, total_timeout: bool = True) -> None:
        p.add_argument(
            "--url",
            default=None,
            help="service URL (env TIDEGATE_URL; default http://127.0.0.1:8080)",
        )
        p.add_argument("--token", default=None, help="API token (env TIDEGATE_TOKEN)")
        p.add_argument(
            "--actor",
            default=os.environ.get("TIDEGATE_ACTOR"),
            help="your name in the audit log when the service runs in open mode (env "
            "TIDEGATE_ACTOR; with tokens the token's label is used)",
        )
        if total_timeout:
            p.add_argument(
                "--timeout",
                type=float,
                default=120.0,
                help="seconds for the whole call, retries included (default 120)",
            )
        p.add_argument(
            "--retries",
            type=int,
            default=5,
            help="retries on network errors, 5xx and 429, with backoff (default 5)",
        )
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
        "submit",
        help="post a snapshot; exit 0 it serves now, 3 held, 4 rejected, 5 unreachable",
        description="Post a snapshot from a JSON file (the fields of the README's post table; "
        "- reads standard input), its sample inside it or in a separate file (--sample). Exit "
        "0: the snapshot serves now; 3: it does not (held); 4: rejected; 5: unreachable.",
    )
    p.add_argument("file", help="JSON file with the snapshot (- for standard input)")
    p.add_argument("--model", default=None, help='the model (default: the file\'s "model")')
    p.add_argument(
        "--sample",
        default=None,
        metavar="FILE",
        help="the sample as a Parquet, Arrow (IPC stream or file) or CSV file; columns named "
        "as in the JSON post (score, label, baseline_score, segment.<name>, ...)",
    )
    p.add_argument(
        "--upload",
        choices=["auto", "json", "arrow"],
        default="auto",
        help="how the sample is sent: auto (Arrow from 20,000 rows, when the service takes it), "
        "json or arrow",
    )
    remote(p)
    p.set_defaults(func=cmd_submit)

    p = sub.add_parser(
        "serving",
        help="print the key of the snapshot that serves now (for a deploy step)",
        description="Print the key of the snapshot that serves MODEL now, alone on a line "
        "(--json: since when and what made it serve). Exit 3 when nothing serves yet.",
    )
    p.add_argument("model")
    remote(p)
    p.set_defaults(func=cmd_serving)

    p = sub.add_parser(
        "wait",
        help="wait until a snapshot serves; exit 0 serves, 3 a newer one serves, 5 timeout",
        description="Wait until SNAPSHOT serves MODEL (exit 0, printing its key), or can no "
        "longer serve because a newer snapshot serves (exit 3), or --timeout passes (exit 5). "
        "A held snapshot comes to serve when an operator overrides the hold.",
    )
    p.add_argument("model")
    p.add_argument("snapshot")
    p.add_argument(
        "--timeout",
        dest="wait_timeout",
        type=float,
        default=600.0,
        help="seconds to wait in all (default 600)",
    )
    p.add_argument("--interval", type=float, default=5.0, help="seconds between polls (default 5)")
    remote(p, total_timeout=False)
    p.set_defaults(func=cmd_wait, timeout=60.0)

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


def _quiet_stdout() -> None:
    """Standard output was closed by its reader (``tidegate why ... | head``): send the rest
    to /dev/null, so that neither this write nor the flush at exit raises again."""
    try:
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        os.close(devnull)
    except (OSError, ValueError, AttributeError):  # no real file behind stdout (tests)
        pass


def main(argv: Sequence[str] | None = None) -> int:
    logging.basicConfig(
        level=logging.WARNING, format="%(asctime)s %(levelname)s %(name)s %(message)s"
    )
    try:
        args = build_parser().parse_args(argv)
        code = int(args.func(args))
        sys.stdout.flush()
        return code
    except BrokenPipeError:
        # the reader went away (``tidegate why ... | head``): what it wanted, it read. submit,
        # serving and wait keep their own exit codes (see _print_then).
        _quiet_stdout()
        return EXIT_OK
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

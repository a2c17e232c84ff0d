"""``tidegate token`` and ``tidegate prune`` on a real database (issue 6)."""

from __future__ import annotations

import json
from typing import Any

import pytest

from service import cli
from tests.databases import Api, snapshot_body


@pytest.fixture
def cli_env(api: Api, monkeypatch: pytest.MonkeyPatch) -> Api:
    monkeypatch.setenv("TIDEGATE_DATABASE_URL", api.settings.database_url)
    return api


def run(capsys: pytest.CaptureFixture[str], *argv: str) -> tuple[int, str, str]:
    code = cli.main(list(argv))
    out = capsys.readouterr()
    return code, out.out, out.err


def test_token_create_list_revoke(cli_env: Api, capsys: pytest.CaptureFixture[str]) -> None:
    api = cli_env
    code, out, err = run(
        capsys,
        "token",
        "create",
        "--role",
        "trainer",
        "--models",
        "shelf-*,also-read",
        "--label",
        "bramble-trainer",
    )
    assert code == 0
    secret = out.strip()
    assert secret.startswith("tg_") and "shown this once" in err
    # the token works for its models and role only
    assert api.post("shelf-ranker", snapshot_body("a", step=1), secret).status_code == 201
    assert api.post("other", snapshot_body("a", step=1), secret).status_code == 403
    put = api.client.put(
        "/v1/models/shelf-ranker/baseline",
        headers=api.headers(secret),
        json={"snapshot": "a", "reason": "r"},
    )
    assert put.status_code == 403

    code, out, _ = run(capsys, "token", "list", "--json")
    listed: list[dict[str, Any]] = json.loads(out)
    mine = next(t for t in listed if t["label"] == "bramble-trainer")
    assert mine["role"] == "trainer" and mine["models"] == ["shelf-*", "also-read"]
    assert mine["last_used_at"] is not None
    assert secret not in out and mine["prefix"] == secret[:11]

    code, out, _ = run(capsys, "token", "revoke", "bramble-trainer")
    assert code == 0 and "revoked" in out
    refused = api.post("shelf-ranker", snapshot_body("b", step=2), secret)
    assert refused.status_code == 401
    code, out, _ = run(capsys, "token", "list", "--json")
    assert "bramble-trainer" not in out
    code, out, _ = run(capsys, "token", "list", "--all", "--json")
    assert "bramble-trainer" in out
    # the text table: a header row, times as everywhere else in the CLI (issue 14)
    code, out, _ = run(capsys, "token", "list", "--all")
    header, *rows = out.splitlines()
    assert header.split() == ["ID", "PREFIX", "ROLE", "MODELS", "LABEL", "STATE"]
    mine_row = next(r for r in rows if "bramble-trainer" in r)
    assert "revoked 20" in mine_row and mine_row.endswith(" UTC")
    code, out, _ = run(capsys, "token", "revoke", str(mine["id"]))
    assert code == 0 and "already" in out


def test_token_create_rejects_bad_input(cli_env: Api, capsys: pytest.CaptureFixture[str]) -> None:
    code, _, err = run(capsys, "token", "create", "--role", "viewer", "--models", "a b")
    assert code == cli.EXIT_ERROR and "model pattern" in err
    with pytest.raises(SystemExit):
        run(capsys, "token", "create", "--role", "root")
    code, _, err = run(capsys, "token", "revoke", "nobody")
    assert code == cli.EXIT_ERROR


def test_token_commands_refuse_an_unmigrated_database(
    tmp_path: Any, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    monkeypatch.setenv("TIDEGATE_DATABASE_URL", f"sqlite:///{tmp_path / 'empty.db'}")
    code, _, err = run(capsys, "token", "create", "--role", "admin")
    assert code == cli.EXIT_ERROR and "tidegate db upgrade" in err

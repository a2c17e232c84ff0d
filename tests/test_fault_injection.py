"""Fault injection (issue 6): the k-th database statement of a post fails, for every k (and the
commit itself fails). Each time the client gets a JSON answer (an error, or a fail-closed hold),
the database holds all of the post or none of it, SQLite's integrity check says ok, and the
post succeeds when retried."""

from __future__ import annotations

import json
import sqlite3
from collections import Counter
from collections.abc import Callable
from typing import Any

import psycopg
import pytest
from sqlalchemy import event

from tests.databases import Api, snapshot_body
from tests.invariants import check_store

COLUMNS = 3  # score, label, segment.device


class Fault:
    """Makes the k-th statement (counted from arming) raise the driver's own error."""

    def __init__(self, engine: Any) -> None:
        self.engine = engine
        self.armed_at: int | None = None
        self.count = 0
        self.sqlite = engine.dialect.name == "sqlite"
        event.listen(engine, "before_cursor_execute", self._before)
        # the commit fails in the driver, as a full disk or a lost connection would make it
        self._do_commit = engine.dialect.do_commit
        engine.dialect.do_commit = self._commit
        self.fail_commit = False

    def arm(self, k: int | None) -> None:
        self.count = 0
        self.armed_at = k

    def _error(self) -> Exception:
        if self.sqlite:
            return sqlite3.OperationalError("injected fault")
        return psycopg.OperationalError("injected fault")

    def _before(self, *args: Any) -> None:
        self.count += 1
        if self.armed_at is not None and self.count == self.armed_at:
            self.armed_at = None
            raise self._error()

    def _commit(self, dbapi_connection: Any) -> None:
        if self.fail_commit:
            self.fail_commit = False
            raise self._error()
        self._do_commit(dbapi_connection)

    def remove(self) -> None:
        event.remove(self.engine, "before_cursor_execute", self._before)
        self.engine.dialect.do_commit = self._do_commit


@pytest.fixture
def open_api(make_api: Callable[..., Api]) -> Api:
    # open mode: every statement counted belongs to the post (no token lookup)
    return make_api(auth="open")


def post(api: Api, body: dict[str, Any]) -> Any:
    return api.client.post("/v1/models/shelf-ranker/snapshots", json=body)


def test_every_statement_of_a_post_can_fail_without_leaving_half_a_post(open_api: Api) -> None:
    api = open_api
    url = api.settings.database_url
    assert post(api, snapshot_body("base", step=1)).status_code == 201
    fault = Fault(api.app.state.engine)
    try:
        fault.arm(None)
        assert post(api, snapshot_body("probe", step=2)).json()["decision"] == "promote"
        statements = fault.count
        assert statements >= 10
        outcomes: Counter[str] = Counter()
        for k in [*range(1, statements + 1), "commit"]:
            body = snapshot_body(f"cand-{k}", step=10 + len(outcomes) + sum(outcomes.values()))
            before = check_store(url, columns_per_sample=COLUMNS)
            if k == "commit":
                fault.arm(None)
                fault.fail_commit = True
            else:
                fault.arm(int(k))
            response = post(api, body)
            fault.arm(None)
            answer = json.loads(response.text)  # always JSON
            after = check_store(url, columns_per_sample=COLUMNS)  # integrity, chain, no halves
            key = ("shelf-ranker", body["key"])
            if response.status_code < 300:
                # all of it: the snapshot, its sample, its verdict (a fail-closed hold when
                # the failed statement was one of those that load comparison data)
                assert key in after.keys and after.snapshots == before.snapshots + 1
                assert after.verdict_of[key][0] == answer["verdict_id"]
                outcomes["stored" if answer["error"] is None else "stored, held fail-closed"] += 1
            else:
                # none of it
                assert response.status_code == 503, response.text
                assert answer["error"]["code"] == "storage_unavailable"
                assert set(answer["error"]) >= {"code", "message"}
                assert after.keys == before.keys and after.columns == before.columns
                assert after.promotions == before.promotions
                outcomes[f"error {response.status_code}"] += 1
            retry = post(api, body)
            assert retry.status_code in (200, 201), (k, retry.text)
            assert retry.status_code == (200 if response.status_code < 300 else 201)
        print(
            f"fault injection on {api.settings.database_url.split(':')[0]}: "
            f"{statements} statements + commit: {dict(outcomes)}"
        )
        assert outcomes["error 503"] >= statements // 2
    finally:
        fault.remove()

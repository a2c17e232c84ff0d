"""Fuzzing (issue 6): schemathesis generates requests from the app's own OpenAPI schema, valid
ones and invalid ones, for every operation; no answer may be a 5xx, and every answer must
conform to the schema (status code declared, content type, body shape).

Bounded: ``EXAMPLES`` examples per operation and generation mode, derandomised (the same cases
every run), no example database. The number of cases run is printed and written to
``tests/artifacts/trust-figures.json``.
"""

from __future__ import annotations

import os
import time
from collections import Counter
from pathlib import Path
from typing import Any

import httpx
import pytest
import schemathesis
from hypothesis import HealthCheck, given, settings
from hypothesis.errors import Unsatisfiable
from schemathesis import GenerationMode
from schemathesis.checks import not_a_server_error
from schemathesis.specs.openapi.checks import (
    content_type_conformance,
    negative_data_rejection,
    response_schema_conformance,
    status_code_conformance,
)

from tests.databases import Api, make_token, settings_for, snapshot_body
from tests.serverproc import Server
from tests.test_server_process import backend, record

EXAMPLES = 25
ADMIN_TOKEN_ID = 1  # make_api makes the admin token first
CHECKS = [
    not_a_server_error,
    status_code_conformance,
    content_type_conformance,
    response_schema_conformance,
]


@pytest.fixture
def seeded(make_api: Any) -> Api:
    api = make_api()
    for step, key in enumerate(("a", "b", "c"), start=1):
        assert api.post("shelf-ranker", snapshot_body(key, step=step)).status_code == 201
    return api


def test_fuzz_every_operation_from_the_openapi_schema(seeded: Api) -> None:
    api = seeded
    schema = schemathesis.openapi.from_asgi("/openapi.json", api.app)
    cases, statuses, operations = fuzz(schema, api.headers(), EXAMPLES)
    total = sum(cases.values())
    record(
        f"fuzz-{api.settings.database_url.split(':')[0].split('+')[0]}",
        {
            "cases": total,
            "operations": len(cases),
            "examples_per_operation_and_mode": EXAMPLES,
            "statuses": dict(sorted(statuses.items())),
        },
    )
    # every operation ran (those without parameters have a single distinct case)
    assert set(cases) == {f"{op.method.upper()} {op.path}" for op in operations}
    assert len(cases) >= 14 and total >= 10 * EXAMPLES
    assert not any(status >= 500 for status in statuses)


#: Examples per operation and mode against a live server (``TIDEGATE_FUZZ_LIVE_EXAMPLES``).
LIVE_EXAMPLES = int(os.environ.get("TIDEGATE_FUZZ_LIVE_EXAMPLES", "200"))


@pytest.mark.slow
def test_fuzz_a_live_server(database_url: str, tmp_path: Path) -> None:
    """The same checks against ``tidegate serve`` over HTTP (a real uvicorn, real sockets),
    at least 5,000 cases per database; 0 failures (a failure raises at once)."""
    settings = settings_for(database_url)
    admin = make_token(settings, "admin", label="fuzz-admin")
    assert admin.id == ADMIN_TOKEN_ID  # the token the fuzzing must not revoke
    with Server(database_url, tmp_path) as server:
        headers = {"Authorization": f"Bearer {admin.secret}"}
        with httpx.Client(base_url=server.url, headers=headers, timeout=120.0) as http:
            for step, key in enumerate(("a", "b", "c"), start=1):
                posted = http.post(
                    "/v1/models/shelf-ranker/snapshots", json=snapshot_body(key, step=step)
                )
                assert posted.status_code == 201, posted.text
        schema = schemathesis.openapi.from_url(f"{server.url}/openapi.json")
        started = time.perf_counter()
        cases, statuses, _ = fuzz(schema, headers, LIVE_EXAMPLES)
        seconds = time.perf_counter() - started
    total = sum(cases.values())
    record(
        f"fuzz-live-{backend(database_url)}",
        {
            "cases": total,
            "operations": len(cases),
            "examples_per_operation_and_mode": LIVE_EXAMPLES,
            "seconds": round(seconds, 1),
            "statuses": dict(sorted(statuses.items())),
        },
    )
    assert not any(status >= 500 for status in statuses)
    if LIVE_EXAMPLES >= 200:
        assert total >= 5000


def fuzz(
    schema: Any, headers: dict[str, str], examples: int
) -> tuple[Counter[str], Counter[int], list[Any]]:
    """Run every operation of *schema*, *examples* cases per generation mode; any failed
    check raises. The admin token must survive the fuzzing: a generated
    ``DELETE /v1/tokens/{id}`` may not revoke it, so its id is never generated."""
    cases: Counter[str] = Counter()
    statuses: Counter[int] = Counter()
    operations = [result.ok() for result in schema.get_all_operations()]

    def fuzzer(operation: Any, mode: GenerationMode) -> Any:
        checks = CHECKS + ([negative_data_rejection] if mode is GenerationMode.NEGATIVE else [])

        @settings(
            max_examples=examples,
            deadline=None,
            derandomize=True,
            database=None,
            suppress_health_check=list(HealthCheck),
        )
        @given(case=operation.as_strategy(generation_mode=mode))
        def run(case: schemathesis.Case) -> None:
            token_id = str((case.path_parameters or {}).get("token_id", ""))
            if token_id.isdigit() and int(token_id) == ADMIN_TOKEN_ID:
                case.path_parameters["token_id"] = ADMIN_TOKEN_ID + 1  # type: ignore[index]
            response = case.call(headers=headers)
            case.validate_response(response, checks=checks)
            cases[f"{operation.method.upper()} {operation.path}"] += 1
            statuses[response.status_code] += 1

        return run

    for operation in operations:
        for mode in (GenerationMode.POSITIVE, GenerationMode.NEGATIVE):
            try:
                fuzzer(operation, mode)()
            except Unsatisfiable:
                # nothing to make invalid (an operation without parameters or body)
                assert mode is GenerationMode.NEGATIVE, operation.path
    return cases, statuses, operations

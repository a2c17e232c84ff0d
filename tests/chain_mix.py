"""A mixed workload on one model: trainers post snapshots while operators override verdicts,
roll back, set the baseline by hand and pin or unpin the reference, all at once. Used by the
chain test (threads on SQLite, several workers on PostgreSQL) and by the crash test.

Every call goes through *call(method, path, json) -> (status, body)*, so the same workload runs
against a TestClient or a real server. Each acknowledged change is returned, so a caller can
check it was kept.
"""

from __future__ import annotations

import random
import threading
import time
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from typing import Any

from tests.databases import snapshot_body

Call = Callable[[str, str, dict[str, Any] | None], tuple[int, Any]]

MODEL = "shelf-ranker"
#: Answers a racing operator action may get besides success: the decision was already in force,
#: or the snapshot already serves (409).
ALLOWED = {200, 201, 409}


@dataclass
class MixResult:
    statuses: dict[str, list[int]] = field(default_factory=dict)
    #: acknowledged posts: key -> verdict id
    posts: dict[str, int] = field(default_factory=dict)
    #: acknowledged operator actions: (kind, detail)
    actions: list[tuple[str, Any]] = field(default_factory=list)
    #: reasons of the acknowledged operator actions (each unique: found in the audit log)
    reasons: list[str] = field(default_factory=list)
    unexpected: list[tuple[str, int, Any]] = field(default_factory=list)
    lock: threading.Lock = field(default_factory=threading.Lock)
    #: set when the server went away (killed): the clients stop
    stopped: threading.Event = field(default_factory=threading.Event)
    #: called (under the lock) with the number of acknowledged changes after each one
    on_ack: Callable[[int], None] | None = None

    def note(self, kind: str, status: int, body: Any) -> None:
        with self.lock:
            self.statuses.setdefault(kind, []).append(status)
            if status == 0:
                self.stopped.set()
            elif status not in ALLOWED:
                self.unexpected.append((kind, status, body))

    def acknowledged(self) -> None:
        """Count one acknowledged change (call under the lock)."""
        if self.on_ack is not None:
            self.on_ack(len(self.posts) + len(self.reasons))

    @property
    def counts(self) -> dict[str, int]:
        return {k: len(v) for k, v in sorted(self.statuses.items())}


def trainer(call: Call, result: MixResult, *, prefix: str, steps: list[int], rows: int) -> None:
    """Post one snapshot per step; every fourth is shifted far enough to be held."""
    for step in steps:
        if result.stopped.is_set():
            return
        body = snapshot_body(
            f"{prefix}-{step}", step=step, seed=step, rows=rows, shift=0.5 if step % 4 == 3 else 0
        )
        status, answer = call("POST", f"/v1/models/{MODEL}/snapshots", body)
        result.note("post", status, answer)
        if status in (200, 201):
            with result.lock:
                result.posts[body["key"]] = int(answer["verdict_id"])
                result.acknowledged()


def operator(call: Call, result: MixResult, *, seed: int, actions: int, tag: str = "") -> None:
    """Override a recent verdict to the decision not in force, roll back or set the baseline
    to a recent snapshot, pin or unpin the reference; chosen at random (seeded)."""
    rng = random.Random(seed)
    n = waits = 0
    while n < actions and not result.stopped.is_set():
        status, page = call("GET", f"/v1/models/{MODEL}/verdicts?limit=8", None)
        if (status == 404 or (status == 200 and not page["data"])) and waits < 2000:
            waits += 1  # no verdict yet: the trainers have not posted
            time.sleep(0.02)
            continue
        n += 1
        if status != 200 or not page["data"]:
            result.note("list", status, page)
            continue
        verdict = rng.choice(page["data"])
        what = rng.random()
        reason = {"reason": f"mixed workload {tag}{seed}-{n}"}
        if what < 0.5:
            decision = "hold" if verdict["effective_decision"] == "promote" else "promote"
            status, answer = call(
                "POST",
                f"/v1/verdicts/{verdict['verdict_id']}/override",
                {"decision": decision, **reason},
            )
            result.note("override", status, answer)
            if status == 201:
                with result.lock:
                    result.actions.append(("override", answer["override"]["id"]))
                    result.reasons.append(reason["reason"])
                    result.acknowledged()
        elif what < 0.8:
            status, answer = call(
                "PUT", f"/v1/models/{MODEL}/baseline", {"snapshot": verdict["snapshot"], **reason}
            )
            result.note("baseline", status, answer)
            if status == 200:
                with result.lock:
                    result.actions.append(("baseline", (answer["baseline"], answer["cause"])))
                    result.reasons.append(reason["reason"])
                    result.acknowledged()
        else:
            key = verdict["snapshot"] if rng.random() < 0.6 else None
            status, answer = call(
                "PUT", f"/v1/models/{MODEL}/reference", {"snapshot": key, **reason}
            )
            result.note("reference", status, answer)
            if status == 200:
                with result.lock:
                    result.actions.append(("reference", answer["reference"]))
                    result.reasons.append(reason["reason"])
                    result.acknowledged()


def run_mix(
    call_for: Callable[[str], Call],
    *,
    trainers: int = 3,
    operators: int = 3,
    posts_per_trainer: int = 12,
    actions_per_operator: int = 12,
    rows: int = 60,
    prefix: str = "mix",
    on_ack: Callable[[int], None] | None = None,
) -> MixResult:
    """Run the workload; *call_for(role)* gives a call function for 'trainer' or 'operator'
    (one per client thread). Watermarks of the trainers interleave."""
    result = MixResult(on_ack=on_ack)

    def run(index: int) -> None:
        if index < trainers:
            steps = [i * trainers + index for i in range(posts_per_trainer)]
            trainer(call_for("trainer"), result, prefix=f"{prefix}{index}", steps=steps, rows=rows)
        else:
            operator(
                call_for("operator"), result, seed=index, actions=actions_per_operator, tag=prefix
            )

    with ThreadPoolExecutor(trainers + operators) as pool:
        list(pool.map(run, range(trainers + operators)))
    return result


def http_call(client: Any) -> Call:
    """A call through an ``httpx.Client``; status 0 when the server is gone (killed)."""
    import httpx

    def call(method: str, path: str, body: dict[str, Any] | None) -> tuple[int, Any]:
        try:
            response = client.request(method, path, json=body)
        except httpx.HTTPError as exc:
            return 0, f"{type(exc).__name__}: {exc}"
        try:
            return response.status_code, response.json()
        except ValueError:
            return response.status_code, response.text

    return call

"""A small Python client for the retraining job and the CLI.

>>> client = TidegateClient("http://127.0.0.1:8080", token="...")  # doctest: +SKIP
>>> body = {"key": "2026-12-01T02:45Z", "sample": {"score": [...]}}   # doctest: +SKIP
>>> verdict = client.post_snapshot("shelf-ranker", body)              # doctest: +SKIP
>>> verdict["decision"]                                               # doctest: +SKIP
'promote'
"""

from __future__ import annotations

import os
from typing import Any

import httpx

DEFAULT_URL = "http://127.0.0.1:8080"


class ClientError(Exception):
    """The service answered with an error, or could not be reached (status 0)."""

    def __init__(self, status: int, code: str, message: str, field: str | None = None) -> None:
        super().__init__(f"{status} {code}: {message}" + (f" (field {field})" if field else ""))
        self.status = status
        self.code = code
        self.message = message
        self.field = field


class TidegateClient:
    def __init__(
        self,
        base_url: str | None = None,
        *,
        token: str | None = None,
        timeout: float = 60.0,
        transport: httpx.BaseTransport | None = None,
    ) -> None:
        self.base_url = (base_url or os.environ.get("TIDEGATE_URL") or DEFAULT_URL).rstrip("/")
        token = token if token is not None else os.environ.get("TIDEGATE_TOKEN")
        headers = {"Authorization": f"Bearer {token}"} if token else {}
        self._http = httpx.Client(
            base_url=self.base_url, headers=headers, timeout=timeout, transport=transport
        )

    def close(self) -> None:
        self._http.close()

    def __enter__(self) -> TidegateClient:
        return self

    def __exit__(self, *_exc: object) -> None:
        self.close()

    def request(self, method: str, path: str, **kwargs: Any) -> Any:
        try:
            response = self._http.request(method, path, **kwargs)
        except httpx.HTTPError as exc:
            raise ClientError(0, "unreachable", f"{self.base_url}: {exc}") from exc
        try:
            body = response.json()
        except ValueError:
            body = None
        if response.status_code >= 400:
            error = (body or {}).get("error", {}) if isinstance(body, dict) else {}
            raise ClientError(
                response.status_code,
                str(error.get("code", "http_error")),
                str(error.get("message", response.text[:200])),
                error.get("field"),
            )
        return body

    # -- the retraining job --------------------------------------------------------------
    def post_snapshot(self, model: str, body: dict[str, Any]) -> dict[str, Any]:
        """Post one snapshot; returns the verdict (also for a retry of a stored snapshot)."""
        return self.request("POST", f"/v1/models/{model}/snapshots", json=body)  # type: ignore[no-any-return]

    # -- reading -------------------------------------------------------------------------
    def models(self) -> list[dict[str, Any]]:
        return self.request("GET", "/v1/models")["data"]  # type: ignore[no-any-return]

    def verdict(self, verdict_id: int) -> dict[str, Any]:
        return self.request("GET", f"/v1/verdicts/{verdict_id}")  # type: ignore[no-any-return]

    def verdicts(self, model: str, **params: Any) -> dict[str, Any]:
        clean = {k: v for k, v in params.items() if v is not None}
        return self.request("GET", f"/v1/models/{model}/verdicts", params=clean)  # type: ignore[no-any-return]

    def snapshot(self, model: str, key: str) -> dict[str, Any]:
        return self.request("GET", f"/v1/models/{model}/snapshots/{key}")  # type: ignore[no-any-return]

    def latest_verdict(self, model: str) -> dict[str, Any]:
        page = self.verdicts(model, limit=1)
        if not page["data"]:
            raise ClientError(404, "not_found", f"model {model!r} has no verdicts")
        return self.verdict(page["data"][0]["verdict_id"])

    # -- operators -----------------------------------------------------------------------
    def set_baseline(self, model: str, snapshot: str, reason: str) -> dict[str, Any]:
        return self.request(  # type: ignore[no-any-return]
            "PUT", f"/v1/models/{model}/baseline", json={"snapshot": snapshot, "reason": reason}
        )

    def replay(self, model: str, policy_text: str | None, limit: int = 100) -> dict[str, Any]:
        """Judge past snapshots again under *policy_text* (None: the policy in force)."""
        return self.request(  # type: ignore[no-any-return]
            "POST", f"/v1/models/{model}/replay", json={"policy": policy_text, "limit": limit}
        )

    def set_reference(self, model: str, snapshot: str | None, reason: str) -> dict[str, Any]:
        """Pin *snapshot* as the model's reference; None unpins."""
        return self.request(  # type: ignore[no-any-return]
            "PUT", f"/v1/models/{model}/reference", json={"snapshot": snapshot, "reason": reason}
        )

    def override(self, verdict_id: int, decision: str, reason: str) -> dict[str, Any]:
        """Put *decision* in force for a verdict, with a reason (audited)."""
        return self.request(  # type: ignore[no-any-return]
            "POST",
            f"/v1/verdicts/{verdict_id}/override",
            json={"decision": decision, "reason": reason},
        )

    def rollback(self, model: str, snapshot: str, reason: str) -> dict[str, Any]:
        """Make an earlier snapshot the baseline again (the same call as set_baseline)."""
        return self.set_baseline(model, snapshot, reason)

    def evidence(self, verdict_id: int, *, bins: int | None = None) -> dict[str, Any]:
        """Both score distributions on common bins, the segment table, what changed."""
        params = {"bins": bins} if bins is not None else {}
        return self.request(  # type: ignore[no-any-return]
            "GET", f"/v1/verdicts/{verdict_id}/evidence", params=params
        )

    def audit(self, **params: Any) -> dict[str, Any]:
        """Audit entries newest first (params: model, limit, cursor)."""
        clean = {k: v for k, v in params.items() if v is not None}
        return self.request("GET", "/v1/audit", params=clean)  # type: ignore[no-any-return]

"""What serves now: the answer a deploy step ships, and where one snapshot stands.

``GET /v1/models/{model}/serving`` names the serving snapshot (the baseline), since when, and
what made it serve: ``gate`` (a promote verdict), ``override`` (an operator overrode a hold),
``manual`` (set by hand to a newer snapshot) or ``rollback`` (set back to an older one), with
the verdict and the audit entry behind it.

Asked about one snapshot (``?snapshot=KEY``), it also says where that snapshot stands:

* ``serves``: it is the baseline;
* ``superseded``: a snapshot that arrived after it serves, so it can no longer come to serve
  by an override (operate.py: an override to promote moves the baseline only to a newer
  snapshot); only an explicit rollback would bring it back;
* ``waiting``: neither; an override to promote would make it serve.
"""

from __future__ import annotations

import hashlib
import json
from typing import Any

from sqlalchemy.orm import Session

from service.errors import NotFound
from service.store import repo
from service.views import iso

#: Promotion causes as the API names them (the gate's promotions are stored as ``verdict``).
CAUSES = {"verdict": "gate", "override": "override", "manual": "manual", "rollback": "rollback"}
#: Audit actions that change what serves.
SERVING_ACTIONS = ("baseline.verdict", "verdict.override", "baseline.manual", "baseline.rollback")


def serving_view(session: Session, *, model_name: str, asked: str | None) -> dict[str, Any]:
    """The ``serving`` answer for *model_name* (and the snapshot *asked* about, if any).

    Raises
    ------
    NotFound
        No such model, or no snapshot *asked*.
    """
    model = repo.get_model(session, name=model_name)
    if model is None:
        raise NotFound(f"no model {model_name!r}", field="model")
    serving = repo.snapshot_by_id(session, snapshot_id=model.baseline_id)
    out: dict[str, Any] = {
        "model": model_name,
        "snapshot": serving.key if serving else None,
        "since": iso(model.baseline_since) if serving else None,
        "trained_until": iso(serving.trained_until) if serving else None,
        "cause": None,
        "verdict_id": None,
        "audit_id": None,
        "actor": None,
        "reason": None,
        "asked": None,
    }
    promotion = repo.serving_promotion(session, model=model)
    if promotion is not None:
        entry = repo.audit_entry_at(
            session, model=model_name, at=promotion.created_at, actions=SERVING_ACTIONS
        )
        out.update(
            cause=CAUSES.get(promotion.cause, promotion.cause),
            verdict_id=promotion.verdict_id,
            audit_id=entry.id if entry is not None else None,
            actor=promotion.actor,
            reason=promotion.reason or None,
        )
    if asked is not None:
        snapshot = repo.get_snapshot(session, model_id=model.id, key=asked)
        if snapshot is None:
            raise NotFound(f"model {model_name!r} has no snapshot {asked!r}", field="snapshot")
        verdict = repo.verdict_for_snapshot(session, snapshot_id=snapshot.id)
        effective = None
        if verdict is not None:
            overrides = repo.overrides_for(session, verdict_ids=[verdict.id])[verdict.id]
            effective = repo.effective_decision(verdict, overrides)
        if serving is not None and serving.id == snapshot.id:
            state = "serves"
        elif serving is not None and serving.id > snapshot.id:  # ids grow with arrival
            state = "superseded"
        else:
            state = "waiting"
        out["asked"] = {
            "snapshot": asked,
            "state": state,
            "verdict_id": verdict.id if verdict is not None else None,
            "decision": verdict.decision if verdict is not None else None,
            "effective_decision": effective,
        }
    return out


def entity_tag(view: dict[str, Any]) -> str:
    """A weak entity tag of the answer: it changes exactly when the answer does."""
    text = json.dumps(view, sort_keys=True, separators=(",", ":"))
    return 'W/"' + hashlib.sha256(text.encode("utf-8")).hexdigest()[:32] + '"'

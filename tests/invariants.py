"""What must hold in a tidegate database whatever happened to it (concurrent posts, a killed
server, a failed statement): used by the concurrency, crash and fault-injection tests."""

from __future__ import annotations

from collections import Counter
from dataclasses import dataclass

from sqlalchemy import select, text

from service.settings import Settings
from service.store import db as store_db
from service.store.tables import (
    AuditRow,
    ModelRow,
    OverrideRow,
    PromotionRow,
    SampleColumnRow,
    SnapshotRow,
    VerdictRow,
)


@dataclass(frozen=True)
class StoreState:
    snapshots: int
    verdicts: int
    promotions: int
    columns: int
    keys: frozenset[tuple[str, str]]  # (model, snapshot key) of every stored snapshot
    verdict_of: dict[tuple[str, str], tuple[int, str]]  # (model, key) -> (verdict id, decision)


def check_store(url: str, *, columns_per_sample: int | None = None) -> StoreState:
    """Assert the invariants of a tidegate database and return what it holds.

    * every snapshot has exactly one verdict, and every verdict one snapshot;
    * a snapshot with sample rows has all its sample columns (``columns_per_sample``) and none
      is empty of data; nothing half-written;
    * per model, the promotions form one chain: each promotion's ``previous_id`` is the snapshot
      of the promotion before it (two candidates never replaced the same baseline), the model's
      baseline is the last promotion's snapshot, and each verdict that moved the baseline has
      the promotion that says so;
    * each verdict was judged against the baseline in force when it was stored;
    * promoted-by-verdict watermarks only advance;
    * SQLite: ``PRAGMA integrity_check`` says ok.
    """
    engine = store_db.make_engine(Settings(database_url=url))
    try:
        with store_db.read_transaction(store_db.make_sessionmaker(engine)) as session:
            if engine.dialect.name == "sqlite":
                assert session.execute(text("PRAGMA integrity_check")).scalar() == "ok"
            models = {m.id: m for m in session.scalars(select(ModelRow))}
            snapshots = {s.id: s for s in session.scalars(select(SnapshotRow))}
            verdicts = list(session.scalars(select(VerdictRow).order_by(VerdictRow.id)))
            promotions = list(session.scalars(select(PromotionRow).order_by(PromotionRow.id)))
            column_counts = Counter(
                sid for (sid,) in session.execute(select(SampleColumnRow.snapshot_id))
            )
            empty_columns = session.scalar(
                select(SampleColumnRow.id).where(SampleColumnRow.length < 0)
            )

            assert empty_columns is None
            by_snapshot = Counter(v.snapshot_id for v in verdicts)
            assert set(by_snapshot) == set(snapshots), (
                "a snapshot without a verdict, or the reverse"
            )
            assert max(by_snapshot.values(), default=1) == 1, "a snapshot with two verdicts"
            for sid, snap in snapshots.items():
                if snap.sample_rows and snap.sample_pruned_at is None:
                    assert column_counts[sid] > 0, f"snapshot {snap.key} lost its sample"
                    if columns_per_sample is not None:
                        assert column_counts[sid] == columns_per_sample, (
                            f"{snap.key}: half a sample"
                        )
                elif not snap.sample_rows:
                    assert column_counts[sid] == 0

            for model_id, model in models.items():
                chain = [p for p in promotions if p.model_id == model_id]
                previous = None
                for promotion in chain:
                    assert promotion.previous_id == previous, (
                        f"model {model.name}: promotion {promotion.id} replaced "
                        f"{promotion.previous_id}, but the baseline then was {previous}"
                    )
                    previous = promotion.snapshot_id
                assert model.baseline_id == previous, (
                    f"model {model.name}: baseline is not the last"
                )
                moved = {v.id for v in verdicts if v.model_id == model_id and v.moved_baseline}
                by_verdict = {p.verdict_id for p in chain if p.cause == "verdict"}
                assert moved == by_verdict, (
                    f"model {model.name}: moved_baseline without a promotion"
                )
                # replay: each verdict saw the baseline of the last promotion stored before it
                events = sorted(
                    [(v.id, 1, v) for v in verdicts if v.model_id == model_id]
                    + [(p.verdict_id, 2, p) for p in chain if p.cause == "verdict"],
                    key=lambda e: (e[0], e[1]),
                )
                if all(p.cause == "verdict" for p in chain):
                    current = None
                    watermark = None
                    for _, kind, row in events:
                        if kind == 1:
                            assert row.baseline_id == current, (
                                f"model {model.name}: verdict {row.id} judged against "
                                f"{row.baseline_id}, the baseline was {current}"
                            )
                        else:
                            current = row.snapshot_id
                            until = snapshots[row.snapshot_id].trained_until
                            if watermark is not None and until is not None:
                                assert until > watermark, "a promotion moved the watermark back"
                            watermark = until if until is not None else watermark

            names = {m.id: m.name for m in models.values()}
            keys = frozenset((names[s.model_id], s.key) for s in snapshots.values())
            verdict_of = {
                (names[snapshots[v.snapshot_id].model_id], snapshots[v.snapshot_id].key): (
                    v.id,
                    v.decision,
                )
                for v in verdicts
            }
            return StoreState(
                snapshots=len(snapshots),
                verdicts=len(verdicts),
                promotions=len(promotions),
                columns=sum(column_counts.values()),
                keys=keys,
                verdict_of=verdict_of,
            )
    finally:
        engine.dispose()


@dataclass(frozen=True)
class ChainState:
    promotions: int
    causes: dict[str, int]
    #: promotions that put an older snapshot in service, per cause
    backwards: dict[str, int]


def check_chain(url: str, *, model: str) -> ChainState:
    """Assert that every writer of *model*'s baseline kept one chain (operators included):

    * each promotion's ``previous_id`` is the snapshot of the promotion before it, and the
      model row's baseline is the last one (as :func:`check_store`);
    * each promotion follows its own rule against the baseline it replaced: by ``verdict``, the
      verdict was judged against that very baseline and the watermark advances; by an override
      to promote, the snapshot arrived after the one it replaces; by an override to hold, the
      replaced baseline is the overridden snapshot and the new one served before it; by hand
      (``manual``) a newer snapshot, by ``rollback`` an older one. So serving goes back to an
      older snapshot only through an explicit act that says so (a rollback, or a hold override
      of what serves);
    * the audit log tells the same story: the entries that moved the baseline, in order, name
      the same before and after as the promotions.
    """
    engine = store_db.make_engine(Settings(database_url=url))
    try:
        with store_db.read_transaction(store_db.make_sessionmaker(engine)) as session:
            row = session.scalars(select(ModelRow).where(ModelRow.name == model)).one()
            snapshots = {
                s.id: s
                for s in session.scalars(select(SnapshotRow).where(SnapshotRow.model_id == row.id))
            }
            verdicts = {
                v.id: v
                for v in session.scalars(select(VerdictRow).where(VerdictRow.model_id == row.id))
            }
            chain = list(
                session.scalars(
                    select(PromotionRow)
                    .where(PromotionRow.model_id == row.id)
                    .order_by(PromotionRow.id)
                )
            )
            overrides = list(
                session.scalars(
                    select(OverrideRow)
                    .where(OverrideRow.verdict_id.in_(list(verdicts)))
                    .order_by(OverrideRow.id)
                )
            )
            audits = list(
                session.scalars(
                    select(AuditRow).where(AuditRow.model == model).order_by(AuditRow.id)
                )
            )
    finally:
        engine.dispose()

    def key(sid: int | None) -> str | None:
        return snapshots[sid].key if sid is not None else None

    causes: Counter[str] = Counter()
    backwards: Counter[str] = Counter()
    previous: int | None = None
    served: list[int] = []
    for p in chain:
        where = f"model {model}: promotion {p.id} ({p.cause}) of {key(p.snapshot_id)}"
        assert p.previous_id == previous, (
            f"{where} replaced {key(p.previous_id)}, but {key(previous)} served then"
        )
        causes[p.cause] += 1
        new, old = snapshots[p.snapshot_id], snapshots.get(previous) if previous else None
        if old is not None and new.id < old.id:
            backwards[p.cause] += 1
        if p.cause == "verdict":
            verdict = verdicts[p.verdict_id] if p.verdict_id else None
            assert verdict is not None and verdict.snapshot_id == new.id, where
            assert verdict.baseline_id == previous, (
                f"{where}: judged against {key(verdict.baseline_id)}, {key(previous)} served"
            )
            if old is not None and old.trained_until and new.trained_until:
                assert new.trained_until > old.trained_until, f"{where}: the watermark went back"
        elif p.cause == "override":
            made = [
                o
                for o in overrides
                if o.verdict_id == p.verdict_id and o.created_at == p.created_at
            ]
            assert len(made) == 1, f"{where}: no override made it"
            if made[0].decision == "promote":
                assert old is None or new.id > old.id, f"{where}: promoted over a newer snapshot"
            else:
                assert old is not None and verdicts[p.verdict_id].snapshot_id == old.id, (
                    f"{where}: a hold override moved a baseline that was not its snapshot"
                )
                assert new.id in served, f"{where}: went back to a snapshot that never served"
        elif p.cause == "manual":
            assert old is None or new.created_at >= old.created_at, where
        else:
            assert p.cause == "rollback" and old is not None, where
            assert new.created_at < old.created_at, where
        served.append(new.id)
        previous = p.snapshot_id
    assert row.baseline_id == previous, f"model {model}: the baseline is not the last promotion"

    moves = [
        a
        for a in audits
        if a.action.startswith("baseline.")
        or (
            a.action == "verdict.override"
            and (a.before or {}).get("baseline") != (a.after or {}).get("baseline")
        )
    ]
    assert len(moves) == len(chain), f"model {model}: {len(moves)} audited moves, {len(chain)}"
    for a, p in zip(moves, chain, strict=True):
        said = ((a.before or {}).get("baseline"), (a.after or {}).get("baseline"))
        assert said == (key(p.previous_id), key(p.snapshot_id)), (
            f"model {model}: audit {a.id} says {said}, promotion {p.id} did "
            f"{(key(p.previous_id), key(p.snapshot_id))}"
        )
    return ChainState(len(chain), dict(causes), dict(backwards))


def chain_breaks(url: str, *, model: str) -> int:
    """How many promotions of *model* replaced a baseline other than the one serving then."""
    engine = store_db.make_engine(Settings(database_url=url))
    try:
        with store_db.read_transaction(store_db.make_sessionmaker(engine)) as session:
            row = session.scalars(select(ModelRow).where(ModelRow.name == model)).one()
            previous, breaks = None, 0
            for p in session.scalars(
                select(PromotionRow)
                .where(PromotionRow.model_id == row.id)
                .order_by(PromotionRow.id)
            ):
                breaks += p.previous_id != previous
                previous = p.snapshot_id
            return breaks
    finally:
        engine.dispose()

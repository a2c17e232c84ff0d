"""API tokens: made, looked up, listed and revoked. Keyword-only functions that never commit.

A token is ``tg_`` followed by 43 URL-safe characters: 32 bytes (256 bits) from
:func:`secrets.token_bytes`. It is shown once, when it is made; the database keeps only its
SHA-256 digest (hex) and its first 11 characters (``prefix``, to tell tokens apart in listings).

Why a plain SHA-256 and not a slow password hash (bcrypt, scrypt, Argon2): slow hashes protect
*low-entropy* secrets that people choose, by making each guess expensive. A 256-bit random token
cannot be guessed whatever the hash costs, so a fast, unsalted digest is enough to make a copied
database useless for calling the service; and being deterministic, it lets us find the token's row
by its digest with one indexed equality lookup (a salted hash would need a scan). The digest found
is compared once more with :func:`hmac.compare_digest` so that no comparison in our code
short-circuits on the first differing byte.
"""

from __future__ import annotations

import hashlib
import hmac
import re
import secrets
from collections.abc import Sequence
from dataclasses import dataclass
from datetime import datetime, timedelta

from sqlalchemy import select
from sqlalchemy.orm import Session

from service.store import repo
from service.store.tables import TokenRow

TOKEN_PREFIX = "tg_"
#: Characters of the token kept in clear to tell tokens apart ("tg_" + 8 random characters;
#: 48 of the 256 random bits, the other 208 stay secret).
SHOWN_CHARS = 11
TOKEN_PATTERN = re.compile(r"^tg_[A-Za-z0-9_-]{43}$")
ROLES = ("viewer", "trainer", "operator", "admin")
MODEL_PATTERN = re.compile(r"^[A-Za-z0-9*?._\-\[\]!]{1,100}$")
#: How often ``last_used_at`` is written for one token (a write per request would queue every
#: read behind the writers).
LAST_USED_EVERY = timedelta(minutes=5)


@dataclass(frozen=True)
class NewToken:
    """A token just made: ``secret`` is shown to the user once and never stored."""

    id: int
    secret: str
    prefix: str
    role: str
    models: tuple[str, ...]
    label: str


def digest(secret: str) -> str:
    """Hex SHA-256 of the token text (what the database stores)."""
    return hashlib.sha256(secret.encode("utf-8")).hexdigest()


def new_secret() -> str:
    """``tg_`` + 32 random bytes, URL-safe base64 without padding (43 characters)."""
    return TOKEN_PREFIX + secrets.token_urlsafe(32)


def check_models(models: Sequence[str]) -> tuple[str, ...]:
    """Validate model scope patterns (shell-style, as in policies); ValueError names the bad one."""
    out = []
    for pattern in models:
        pattern = pattern.strip()
        if not pattern:
            continue
        if not MODEL_PATTERN.match(pattern):
            raise ValueError(
                f"model pattern {pattern!r}: use letters, digits, . _ - and the wildcards * ? []"
            )
        out.append(pattern)
    if not out:
        raise ValueError("give at least one model pattern ('*' for every model)")
    return tuple(dict.fromkeys(out))


def create_token(
    session: Session, *, role: str, models: Sequence[str], label: str, actor: str, now: datetime
) -> NewToken:
    """Make a token (audited as done by *actor*); returns it with its secret (the only time the
    secret exists)."""
    if role not in ROLES:
        raise ValueError(f"role {role!r}: one of {', '.join(ROLES)}")
    scope = check_models(models)
    secret = new_secret()
    row = TokenRow(
        token_hash=digest(secret),
        prefix=secret[:SHOWN_CHARS],
        role=role,
        models=list(scope),
        label=label.strip()[:200],
        created_at=now,
    )
    session.add(row)
    session.flush()
    if not row.label:
        row.label = f"{role}-{row.id}"
        session.flush()
    repo.add_audit(
        session,
        actor=actor,
        action="token.create",
        model=None,
        target=row.prefix,
        before=None,
        after={"role": role, "models": list(scope), "label": row.label},
        reason="",
        now=now,
    )
    return NewToken(row.id, secret, row.prefix, role, scope, row.label)


def find_token(session: Session, *, secret: str) -> TokenRow | None:
    """The live (not revoked) token whose secret is *secret*, else None."""
    if not TOKEN_PATTERN.match(secret):
        return None
    wanted = digest(secret)
    row = session.scalars(select(TokenRow).where(TokenRow.token_hash == wanted)).first()
    if row is None or not hmac.compare_digest(row.token_hash, wanted):
        return None
    if row.revoked_at is not None:
        return None
    return row


def list_tokens(session: Session, *, include_revoked: bool = False) -> Sequence[TokenRow]:
    stmt = select(TokenRow).order_by(TokenRow.id)
    if not include_revoked:
        stmt = stmt.where(TokenRow.revoked_at.is_(None))
    return session.scalars(stmt).all()


def resolve_ref(session: Session, *, ref: str) -> TokenRow | None:
    """A token by id (``12``), by its shown prefix (``tg_AbCdEfGh``) or by its label."""
    ref = ref.strip()
    if ref.isdigit():
        return session.get(TokenRow, int(ref))
    rows = session.scalars(
        select(TokenRow).where((TokenRow.prefix == ref) | (TokenRow.label == ref))
    ).all()
    live = [r for r in rows if r.revoked_at is None]
    if len(live) > 1:
        raise ValueError(f"{ref!r} names {len(live)} tokens; revoke by id")
    return live[0] if live else (rows[0] if rows else None)


def revoke_token(session: Session, *, token: TokenRow, actor: str, now: datetime) -> bool:
    """Revoke *token* (audited as done by *actor*); False when it already was."""
    if token.revoked_at is not None:
        return False
    token.revoked_at = now
    session.flush()
    repo.add_audit(
        session,
        actor=actor,
        action="token.revoke",
        model=None,
        target=token.prefix,
        before={"revoked": False},
        after={"revoked": True},
        reason="",
        now=now,
    )
    return True

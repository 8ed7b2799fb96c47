"""API keys: created and revoked by the CLI, stored as SHA-256 hashes, checked in constant time.

Roles and what each may do are ``service.domain.GRANTS``.
"""

from __future__ import annotations

import hashlib
import hmac
import secrets
import time
from dataclasses import dataclass

from sqlalchemy import Engine, select, update

from service.domain import GRANTS, plain_text
from service.errors import NotFound, ValidationFailed
from service.store import tables as models
from service.store.engine import read_transaction, write_transaction

KEY_PREFIX = "tw_"


@dataclass(frozen=True)
class Principal:
    name: str
    role: str

    def may(self, permission: str) -> bool:
        return permission in GRANTS[self.role]


def hash_key(key: str) -> str:
    return hashlib.sha256(key.encode("utf-8")).hexdigest()


def create_key(engine: Engine, *, name: str, role: str) -> str:
    """Create a key and return it; only its hash is stored, so this is the one time it is seen."""
    if role not in GRANTS:
        raise ValidationFailed(f"unknown role {role!r}; roles are {', '.join(GRANTS)}")
    if not name or len(name) > 100:
        raise ValidationFailed("a key name is 1 to 100 characters")
    try:
        plain_text(name)
    except ValueError as exc:
        raise ValidationFailed(f"key name {exc}") from None
    key = KEY_PREFIX + secrets.token_urlsafe(32)
    k = models.api_keys
    with write_transaction(engine) as conn:
        if conn.execute(select(k.c.key_id).where(k.c.name == name)).first() is not None:
            raise ValidationFailed(f"a key named {name!r} exists already; revoke it or pick another name")
        conn.execute(k.insert().values(name=name, role=role, key_hash=hash_key(key),
                                       created_s=time.time(), revoked_s=None))
    return key


def revoke_key(engine: Engine, name: str) -> None:
    try:
        plain_text(name)
    except ValueError:
        raise NotFound(f"no active key named {name!r} (key names hold no control characters)"
                       ) from None
    k = models.api_keys
    with write_transaction(engine) as conn:
        res = conn.execute(update(k).where(k.c.name == name, k.c.revoked_s.is_(None))
                           .values(revoked_s=time.time()))
        if res.rowcount == 0:
            raise NotFound(f"no active key named {name!r}")


def list_keys(engine: Engine) -> list[dict]:
    k = models.api_keys
    with read_transaction(engine) as conn:
        rows = conn.execute(select(k.c.name, k.c.role, k.c.created_s, k.c.revoked_s)
                            .order_by(k.c.name)).all()
    return [dict(r._mapping) for r in rows]


def authenticate(engine: Engine, presented: str) -> Principal | None:
    digest = hash_key(presented)
    k = models.api_keys
    with read_transaction(engine) as conn:
        row = conn.execute(select(k.c.name, k.c.role, k.c.key_hash)
                           .where(k.c.key_hash == digest, k.c.revoked_s.is_(None))).first()
    if row is None or not hmac.compare_digest(row.key_hash, digest):
        return None
    return Principal(row.name, row.role)

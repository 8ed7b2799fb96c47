"""Dependencies shared by the routers: settings, engine, and role checks."""

from __future__ import annotations

from typing import Annotated

from fastapi import Depends, Request
from sqlalchemy import Engine

from .config import Settings
from .errors import Forbidden, Unauthorized
from .security import Principal, authenticate

LOOPBACK = {"127.0.0.1", "::1", "localhost"}


def get_settings(request: Request) -> Settings:
    return request.app.state.settings


def get_engine(request: Request) -> Engine:
    return request.app.state.engine


SettingsDep = Annotated[Settings, Depends(get_settings)]
EngineDep = Annotated[Engine, Depends(get_engine)]


def _principal(request: Request, permission: str) -> Principal:
    settings: Settings = request.app.state.settings
    header = request.headers.get("authorization")
    if header is None:
        client = request.client.host if request.client else None
        if settings.auth == "loopback-open" and client in LOOPBACK:
            return Principal("loopback-demo", "admin")
        raise Unauthorized("missing API key; send 'Authorization: Bearer <key>' "
                           "(keys are made with `tallyward keys create`)")
    scheme, _, key = header.partition(" ")
    if scheme.lower() != "bearer" or not key.strip():
        raise Unauthorized("the Authorization header must be 'Bearer <key>'")
    principal = authenticate(request.app.state.engine, key.strip())
    if principal is None:
        raise Unauthorized("unknown or revoked API key")
    if not principal.may(permission):
        raise Forbidden(f"key {principal.name!r} has role {principal.role!r}, which may not "
                        f"{permission}; this needs a key with a role that grants {permission!r}")
    return principal


def require(permission: str):  # type: ignore[no-untyped-def]
    def dependency(request: Request) -> Principal:
        return _principal(request, permission)

    return Depends(dependency)


ReadDep = Annotated[Principal, require("read")]
IngestDep = Annotated[Principal, require("ingest")]
OperateDep = Annotated[Principal, require("operate")]
AdminDep = Annotated[Principal, require("admin")]

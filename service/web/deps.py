"""Dependencies shared by the routers: settings, engine, and role checks."""

from __future__ import annotations

from typing import Annotated

from fastapi import Depends, Request
from sqlalchemy import Engine

from service.config import Settings
from service.domain import PERMISSION_ACTIONS, roles_granting
from service.errors import Forbidden, Unauthorized
from service.store.keys import Principal, authenticate

LOOPBACK = {"127.0.0.1", "::1", "localhost"}
# A request relayed by a proxy on this host arrives from loopback; these headers show it was
# relayed, so loopback-open does not admit it.
FORWARDING_HEADERS = ("forwarded", "x-forwarded-for", "x-real-ip")
# Where the body-guard middleware leaves the principal it authenticated, so the route's
# dependency does not look the key up twice.
PRINCIPAL_SCOPE_KEY = "tallyward.principal"


def settings_of(request: Request) -> Settings:
    return request.app.state.settings


def get_engine(request: Request) -> Engine:
    return request.app.state.engine


SettingsDep = Annotated[Settings, Depends(settings_of)]
EngineDep = Annotated[Engine, Depends(get_engine)]


def is_local_demo_client(settings: Settings, client: str | None,
                         header_names: set[str] | frozenset[str]) -> bool:
    """True when ``auth=loopback-open`` admits this request without a key: it comes from a
    loopback address and carries no proxy forwarding header."""
    return (settings.auth == "loopback-open" and client in LOOPBACK
            and not any(h in header_names for h in FORWARDING_HEADERS))


def identify(settings: Settings, engine: Engine, *, authorization: str | None,
             client: str | None, header_names: set[str] | frozenset[str]) -> Principal:
    """The principal behind a request's Authorization header; ``Unauthorized`` if none.

    Runs a database query when a key is presented (call it from a worker thread)."""
    if authorization is None:
        if is_local_demo_client(settings, client, header_names):
            return Principal("loopback-demo", "admin")
        raise Unauthorized("missing API key; send 'Authorization: Bearer <key>' "
                           "(keys are made with `tallyward keys create`)")
    scheme, _, key = authorization.partition(" ")
    if scheme.lower() != "bearer" or not key.strip():
        raise Unauthorized("the Authorization header must be 'Bearer <key>'")
    principal = authenticate(engine, key.strip())
    if principal is None:
        raise Unauthorized("unknown or revoked API key")
    return principal


def check_permission(principal: Principal, permission: str) -> None:
    if not principal.may(permission):
        action = PERMISSION_ACTIONS.get(permission, permission)
        allowed = " or ".join(roles_granting(permission))
        raise Forbidden(f"key {principal.name!r} has the {principal.role!r} role; to {action} "
                        f"use a key with the {allowed} role")


def _principal(request: Request, permission: str) -> Principal:
    principal = request.scope.get(PRINCIPAL_SCOPE_KEY)
    if principal is None:
        principal = identify(request.app.state.settings, request.app.state.engine,
                             authorization=request.headers.get("authorization"),
                             client=request.client.host if request.client else None,
                             header_names=set(request.headers.keys()))
    check_permission(principal, permission)
    return principal


def require(permission: str):  # type: ignore[no-untyped-def]
    def dependency(request: Request) -> Principal:
        return _principal(request, permission)

    # Read by the body guard in service.web.app to refuse a wrong role before reading a body.
    dependency.permission = permission  # type: ignore[attr-defined]
    return Depends(dependency)


ReadDep = Annotated[Principal, require("read")]
IngestDep = Annotated[Principal, require("ingest")]
OperateDep = Annotated[Principal, require("operate")]
AdminDep = Annotated[Principal, require("admin")]

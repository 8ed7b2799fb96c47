"""``/docs`` (Swagger UI) and ``/redoc`` served with the script, style sheet and icon files
of the ``fastapi-offline`` package, so both pages work on a network without internet access:
no script, style sheet, font or image comes from another host (ReDoc without Google Fonts,
Swagger UI without the online validator badge). Its Swagger UI 5 renders OpenAPI 3.1, which
FastAPI publishes."""

from __future__ import annotations

from typing import Any

from fastapi import FastAPI
from fastapi_offline import FastAPIOffline

DOCS_URL = "/docs"
REDOC_URL = "/redoc"
ASSETS_URL = "/docs/assets"


def offline_app(**kwargs: Any) -> FastAPI:
    """A FastAPI app whose documentation pages load only from this service."""
    return FastAPIOffline(docs_url=DOCS_URL, redoc_url=REDOC_URL, static_url=ASSETS_URL,
                          swagger_ui_parameters={"validatorUrl": None}, **kwargs)

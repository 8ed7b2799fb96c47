"""One exception hierarchy, mapped to HTTP in one place (``service.web.app``).

::

    TallywardError                      500  (never raised bare)
    ├── BadRequest                      400  malformed body: not JSON, not CSV, wrong shape
    ├── ValidationFailed                422  well-formed but unacceptable values
    ├── Unauthorized                    401  missing or unknown API key
    ├── Forbidden                       403  key lacks the role
    ├── NotFound                        404  unknown detector, alert, baseline
    ├── PayloadTooLarge                 413  body or batch over the configured limit
    ├── UnsupportedMediaType            415  a body that is neither JSON nor CSV
    └── Unavailable                     503  database busy or down; retry later (Retry-After)

Each carries a stable ``code`` (machine-readable) and a ``message`` that says what was
wrong and what is accepted.
"""

from __future__ import annotations

from typing import Any


class TallywardError(Exception):
    status_code = 500
    code = "internal_error"

    def __init__(self, message: str, *, detail: Any = None, code: str | None = None) -> None:
        super().__init__(message)
        self.message = message
        self.detail = detail
        if code is not None:
            self.code = code

    def to_dict(self) -> dict[str, Any]:
        body: dict[str, Any] = {"error": self.code, "message": self.message}
        if self.detail is not None:
            body["detail"] = self.detail
        return body


class BadRequest(TallywardError):
    status_code = 400
    code = "bad_request"


class ValidationFailed(TallywardError):
    status_code = 422
    code = "validation_failed"


class Unauthorized(TallywardError):
    status_code = 401
    code = "unauthorized"


class Forbidden(TallywardError):
    status_code = 403
    code = "forbidden"


class NotFound(TallywardError):
    status_code = 404
    code = "not_found"


class PayloadTooLarge(TallywardError):
    status_code = 413
    code = "payload_too_large"


class UnsupportedMediaType(TallywardError):
    status_code = 415
    code = "unsupported_media_type"


class Unavailable(TallywardError):
    status_code = 503
    code = "unavailable"
    retry_after_s = 2

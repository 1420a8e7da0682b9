"""Typed errors: one class per error code of the befit HTTP API, plus the
client's own failures (transport, pinning, requests too large to split).

Every error the server sends has the shape
``{"error": {"code": ..., "message": ..., "field": ...}}``; :func:`from_response`
turns it into the matching :class:`ApiError` subclass so a training loop can
``except befit_client.OverloadedError`` instead of comparing strings.
"""

from __future__ import annotations

import json
from typing import Any, Dict, Mapping, Optional, Type


class BefitError(Exception):
    """Base of every error raised by this package."""


class ApiError(BefitError):
    """The server answered with an error body.

    ``status`` is the HTTP status, ``code`` the API's error code (e.g.
    ``"invalid_field"``), ``message`` the server's explanation and ``field``
    the request field to blame, when the server named one. ``retry_after`` is
    the ``Retry-After`` header in seconds, when the answer carried one.
    ``attempts`` counts the tries made before giving up (1 unless retried).
    """

    code_name: str = ""

    def __init__(
        self,
        status: int,
        code: str,
        message: str,
        field: Optional[str] = None,
        retry_after: Optional[float] = None,
        attempts: int = 1,
    ) -> None:
        self.status = status
        self.code = code
        self.message = message
        self.field = field
        self.retry_after = retry_after
        self.attempts = attempts
        text = f"{status} {code}: {message}"
        if field:
            text += f" (field {field})"
        super().__init__(text)


class BadJsonError(ApiError):
    code_name = "bad_json"


class InvalidFieldError(ApiError):
    code_name = "invalid_field"


class OverLimitError(ApiError):
    code_name = "over_limit"


class PathRefusedError(ApiError):
    code_name = "path_refused"


class UnknownImageError(ApiError):
    code_name = "unknown_image"


class UnknownModelError(ApiError):
    code_name = "unknown_model"


class UnknownMapError(ApiError):
    code_name = "unknown_map"


class NotFoundError(ApiError):
    code_name = "not_found"


class MethodNotAllowedError(ApiError):
    code_name = "method_not_allowed"


class BodyTooLargeError(ApiError):
    code_name = "body_too_large"


class UnsupportedMediaTypeError(ApiError):
    code_name = "unsupported_media_type"


class BadImageError(ApiError):
    code_name = "bad_image"


class ImageTooLargeError(ApiError):
    code_name = "image_too_large"


class KeyRequiredError(ApiError):
    """401 ``key_required``: the server has keys and the request had no valid
    one (give ``key=`` or set ``BEFIT_API_KEY``)."""

    code_name = "key_required"


class ScopeMissingError(ApiError):
    """403 ``scope_missing``: the key lacks the scope the route needs."""

    code_name = "scope_missing"


class CrossOriginError(ApiError):
    code_name = "cross_origin"


class HostRefusedError(ApiError):
    """421 ``host_refused``: the server does not answer to the host name in
    the URL (its operator adds names with ``--allow-host``)."""

    code_name = "host_refused"


class RateLimitedError(ApiError):
    """429 ``rate_limited``: the key is over its rate; retried by default,
    after the answer's ``Retry-After``."""

    code_name = "rate_limited"


class OverloadedError(ApiError):
    """503 ``overloaded``: the server shed the request; retried by default."""

    code_name = "overloaded"


class NotReadyError(ApiError):
    """503 ``not_ready``: bundles are still loading; retried by default."""

    code_name = "not_ready"


class InternalError(ApiError):
    code_name = "internal"


ERROR_CLASSES: Dict[str, Type[ApiError]] = {
    cls.code_name: cls
    for cls in (
        BadJsonError,
        InvalidFieldError,
        OverLimitError,
        PathRefusedError,
        UnknownImageError,
        UnknownModelError,
        UnknownMapError,
        NotFoundError,
        MethodNotAllowedError,
        BodyTooLargeError,
        UnsupportedMediaTypeError,
        BadImageError,
        ImageTooLargeError,
        KeyRequiredError,
        ScopeMissingError,
        CrossOriginError,
        HostRefusedError,
        RateLimitedError,
        OverloadedError,
        NotReadyError,
        InternalError,
    )
}


class TransportError(BefitError):
    """No usable HTTP answer: connection refused or dropped, or a timeout.

    ``attempts`` counts the tries made; ``__cause__`` is the last OS error.
    """

    def __init__(self, message: str, attempts: int = 1) -> None:
        self.attempts = attempts
        super().__init__(message)


class ProtocolError(BefitError):
    """The server answered something that is not what the API promises
    (a body that is not JSON, a reward list of the wrong length, ...)."""


class ModelMismatchError(BefitError):
    """An answer came from another reward model than the one pinned.

    Raised instead of silently mixing two reward models in one run: the
    caller pinned ``expected`` (a bundle digest) and the server answered with
    ``got`` for model ``model_id``.
    """

    def __init__(self, expected: str, got: str, model_id: str) -> None:
        self.expected = expected
        self.got = got
        self.model_id = model_id
        super().__init__(
            f"reward model changed: pinned digest {expected[:12]}..., "
            f"but {model_id} answered with digest {got[:12]}...; start a new run "
            f"(or a new Client) to use the new model"
        )


class RequestTooLargeError(BefitError, ValueError):
    """A part of a request that cannot be split exceeds a limit on its own
    (one group with more captions than ``max_captions``, one caption longer
    than ``max_caption_bytes``, one image larger than ``max_body_bytes``).

    ``field`` names the part as the server would (``groups[3].captions``);
    ``limit`` names the :class:`~befit_client.Limits` attribute.
    """

    def __init__(self, message: str, field: str, limit: str) -> None:
        self.field = field
        self.limit = limit
        super().__init__(f"{message} (field {field}; raise Limits.{limit} if the server allows more)")


def from_response(status: int, body: bytes, retry_after: Optional[float] = None) -> ApiError:
    """The typed error for an error answer; tolerant of bodies that are not
    the API's shape (a proxy's HTML page becomes code ``http_<status>``)."""
    code, message, field = f"http_{status}", "", None
    try:
        doc: Any = json.loads(body.decode("utf-8"))
    except (UnicodeDecodeError, ValueError):
        doc = None
    err = doc.get("error") if isinstance(doc, Mapping) else None
    if isinstance(err, Mapping):
        code = str(err.get("code", code))
        message = str(err.get("message", ""))
        raw_field = err.get("field")
        field = str(raw_field) if raw_field is not None else None
    else:
        message = body[:200].decode("utf-8", "replace").strip()
    cls = ERROR_CLASSES.get(code, ApiError)
    return cls(status, code, message, field, retry_after)

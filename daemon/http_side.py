"""The HTTP side: metrics, health, the status page and corrections, on the SMTP side's loop.

Paths::

    GET  /          status page (HTML)
    GET  /metrics   Prometheus text exposition format
    GET  /healthz   200 while the process runs
    GET  /readyz    200 when every readiness check passes (store reachable, SMTP listening),
                    else 503; the body names each check
    GET  /quarantine                      held mail (JSON), behind the bearer token
    POST /quarantine/<id>/release         send a held message to its original recipients,
                                          behind the bearer token: 200, 404 not held,
                                          409 released before, 502 next hop refused
    POST /reload    re-read the configuration file as SIGHUP does, behind the bearer token:
                    200 applied, 409 refused (the running configuration is kept; the body
                    names the key and the reason)
    POST /feedback  a correction, behind ``Authorization: Bearer <http.token>``:
                    JSON ``{"tracking_id": "...", "kind": "spam" | "ham"}``, or the message
                    itself as ``Content-Type: message/rfc822`` with ``?kind=spam|ham``

``kind`` says what the message should have been ("ham": it was wanted mail).  Every error
is a JSON object ``{"error": "<what was wrong>"}`` with the status code: 400 malformed
request, 401 missing or wrong token (with ``WWW-Authenticate``, RFC 6750), 403 the endpoint is
closed because no token is configured, 413 body over the size limit, 415 unsupported
content type, 503 store busy.  Feedback outcomes map to 200 (trained, moved, already known),
404 (no original), 429 (rate limited) and 403 (refused).
"""

from __future__ import annotations

import asyncio
import hmac
import json
import logging
import re
from collections.abc import Awaitable, Callable, Mapping
from typing import TYPE_CHECKING, Any, Final

from aiohttp import web
from aiohttp.typedefs import Handler

from mailweir.daemon.feedback_types import (
    FeedbackOutcome,
    FeedbackRequest,
    FeedbackStatus,
)
from mailweir.daemon.metrics import Metrics
from mailweir.store.errors import StoreBusy, StoreUnavailable
from mailweir.store.held_mail import HeldMailError

log = logging.getLogger("mailweir.http")

if TYPE_CHECKING:
    from mailweir.daemon.quarantine import Quarantine

FeedbackHandler = Callable[[FeedbackRequest], Awaitable[FeedbackOutcome]]
ReadyCheck = Callable[[], Awaitable[bool]]
PageRenderer = Callable[[], Awaitable[str]]

DEFAULT_MAX_BODY: Final = 64 * 1024 * 1024  # same as smtp.max_message_bytes' default
READY_CHECK_TIMEOUT: Final = 5.0
# The classic text format.  prometheus_client 0.22+ labels its output "version=1.0.0" (which
# allows UTF-8 names); every mailweir_ name is a classic one, so the output is the same and
# the older label is understood by every Prometheus release.
METRICS_CONTENT_TYPE: Final = "text/plain; version=0.0.4; charset=utf-8"
# The verdict log's column is 64 characters; our ids are 16 base32hex characters.
TRACKING_ID: Final = re.compile(r"[A-Za-z0-9_-]{1,64}")
CORRECTIONS: Final = ("spam", "ham")
STATUS_CODES: Final = {
    FeedbackStatus.TRAINED: 200,
    FeedbackStatus.MOVED: 200,
    FeedbackStatus.ALREADY_KNOWN: 200,
    FeedbackStatus.NO_ORIGINAL: 404,
    FeedbackStatus.RATE_LIMITED: 429,
    FeedbackStatus.REFUSED: 403,
}


# 404 nothing held under the id; 409 it was released already or a release is under way (a
# conflict with the resource's state, RFC 9110 section 15.5.10); 502 the next hop refused.
RELEASE_REFUSALS: Final = {
    "NotHeld": 404,
    "AlreadyReleased": 409,
    "ReleaseUnderway": 409,
    "ReleaseFailed": 502,
}


class BadRequest(Exception):
    """The request cannot be understood; the message says what was wrong."""


def _error(status: int, message: str, headers: Mapping[str, str] | None = None) -> web.Response:
    return web.json_response({"error": message}, status=status, headers=headers)


@web.middleware
async def _json_errors(request: web.Request, handler: Handler) -> web.StreamResponse:
    """Answer aiohttp's own HTTP errors (404, 405, 413 ...) and our own failures as JSON."""
    try:
        return await handler(request)
    except web.HTTPException as exc:
        if exc.status < 400:
            raise
        kept = {k: v for k, v in exc.headers.items() if k in ("Allow", "WWW-Authenticate")}
        return _error(exc.status, _text(exc) or exc.reason, kept)
    except Exception:
        # The client gets a short answer; the traceback goes to the log, nothing is lost.
        log.exception("HTTP %s %s failed", request.method, request.path)
        return _error(500, "internal error; the daemon log has the details")


def _text(exc: web.HTTPException) -> str:
    text = (exc.text or "").strip()
    # aiohttp's default bodies start with the status line ("413: Request Entity Too Large").
    return text.split(": ", 1)[1] if re.match(r"^\d{3}: ", text) else text


class HttpSide:
    """The aiohttp application and its listening socket."""

    def __init__(
        self,
        metrics: Metrics,
        *,
        token: str,
        feedback: FeedbackHandler,
        page: PageRenderer,
        ready_checks: Mapping[str, ReadyCheck],
        max_body_bytes: int = DEFAULT_MAX_BODY,
    ) -> None:
        self.metrics = metrics
        self.token = token  # replaced on reload; read per request
        self._feedback = feedback
        self._page = page
        self._ready_checks = dict(ready_checks)
        self._max_body = max_body_bytes
        self.quarantine: Quarantine | None = None  # the service sets it; None: routes say so
        # The service's reload: None when applied, else why it was refused.
        self.reload: Callable[[], str | None] | None = None
        self.app = web.Application(client_max_size=max_body_bytes, middlewares=[_json_errors])
        self.app.add_routes(
            [
                web.get("/", self._status_page),
                web.get("/metrics", self._metrics),
                web.get("/healthz", self._healthz),
                web.get("/readyz", self._readyz),
                web.post("/feedback", self._post_feedback),
                web.get("/quarantine", self._held_list),
                web.post("/quarantine/{tracking_id}/release", self._release_held),
                web.post("/reload", self._reload),
            ]
        )
        self._runner: web.AppRunner | None = None
        self._site: web.TCPSite | None = None
        self.port: int | None = None

    async def start(self, host: str, port: int) -> None:
        """Bind and serve; ``port`` 0 picks a free port, readable afterwards as ``self.port``."""
        runner = web.AppRunner(self.app, access_log=None, shutdown_timeout=5.0)
        await runner.setup()
        site = web.TCPSite(runner, host, port)
        try:
            await site.start()
        except BaseException:
            await runner.cleanup()
            raise
        self._runner, self._site = runner, site
        self.port = int(runner.addresses[0][1])
        log.info("HTTP side listening on %s:%s", host, self.port)

    async def stop(self) -> None:
        if self._runner is not None:
            await self._runner.cleanup()
            self._runner = self._site = None

    # -- read-only endpoints ---------------------------------------------------------------

    async def _metrics(self, request: web.Request) -> web.Response:
        return web.Response(
            body=self.metrics.render(), headers={"Content-Type": METRICS_CONTENT_TYPE}
        )

    async def _healthz(self, request: web.Request) -> web.Response:
        return web.json_response({"status": "alive"})

    async def _readyz(self, request: web.Request) -> web.Response:
        names = list(self._ready_checks)
        results = await asyncio.gather(*(self._check(name) for name in names))
        checks = dict(zip(names, results, strict=True))
        ready = all(ok for ok, _ in checks.values())
        body = {
            "status": "ready" if ready else "not ready",
            "checks": {name: {"ok": ok, "detail": detail} for name, (ok, detail) in checks.items()},
        }
        return web.json_response(body, status=200 if ready else 503)

    async def _check(self, name: str) -> tuple[bool, str]:
        try:
            ok = await asyncio.wait_for(self._ready_checks[name](), READY_CHECK_TIMEOUT)
        except TimeoutError:
            return False, f"no answer within {READY_CHECK_TIMEOUT:g} s"
        except Exception as exc:
            log.warning("readiness check %s failed", name, exc_info=True)
            return False, f"{type(exc).__name__}: {exc}"
        return bool(ok), "ok" if ok else "failing"

    async def _status_page(self, request: web.Request) -> web.Response:
        html = await self._page()
        return web.Response(
            text=html,
            content_type="text/html",
            headers={
                # No scripts, no outside assets: the policy says so to the browser too.
                "Content-Security-Policy": "default-src 'none'; style-src 'unsafe-inline'",
                "Cache-Control": "no-store",
            },
        )

    # -- quarantine ------------------------------------------------------------------------

    async def _held_list(self, request: web.Request) -> web.Response:
        refusal = self._authorize(request, "the quarantine")
        if refusal is not None or self.quarantine is None:
            return refusal or _error(404, "no quarantine on this daemon")
        envelopes = await asyncio.to_thread(self.quarantine.store.envelopes)
        return web.json_response({"held": [e.to_json() for e in envelopes]})

    async def _release_held(self, request: web.Request) -> web.Response:
        refusal = self._authorize(request, "the quarantine")
        if refusal is not None or self.quarantine is None:
            return refusal or _error(404, "no quarantine on this daemon")
        try:
            done = await self.quarantine.release(request.match_info["tracking_id"], "http")
        except HeldMailError as exc:
            return _error(RELEASE_REFUSALS.get(type(exc).__name__, 409), str(exc))
        body = {
            "status": "released",
            "tracking_id": done.tracking_id,
            "delivered_to": list(done.delivered_to),
            "refused": list(done.refused),
            "next_hop_answer": done.next_hop_answer,
        }
        return web.json_response(body)

    # -- configuration ---------------------------------------------------------------------

    async def _reload(self, request: web.Request) -> web.Response:
        refusal = self._authorize(request, "reload")
        if refusal is not None or self.reload is None:
            return refusal or _error(404, "reload is not available on this daemon")
        problem = self.reload()
        if problem is not None:
            return _error(409, f"reload refused, the running configuration is kept: {problem}")
        return web.json_response({"status": "applied"})

    # -- corrections -----------------------------------------------------------------------

    async def _post_feedback(self, request: web.Request) -> web.Response:
        refusal = self._authorize(request)
        if refusal is not None:
            return refusal
        try:
            item = await self._parse_feedback(request)
        except BadRequest as exc:
            self.metrics.feedback_refused("invalid")
            return _error(400, str(exc))
        except web.HTTPRequestEntityTooLarge:
            self.metrics.feedback_refused("invalid")
            return _error(413, f"request body is larger than the limit of {self._max_body} bytes")
        try:
            outcome = await self._feedback(item)
        except (StoreBusy, StoreUnavailable) as exc:
            log.warning("feedback from %s not stored: %s", item.client, exc)
            return _error(503, "the model store is busy; try again later", {"Retry-After": "30"})
        log.info(
            "feedback from %s: %s for %s -> %s",
            item.client,
            item.correction,
            item.tracking_id or "a raw message",
            outcome.status,
        )
        body = {
            "status": outcome.status.value,
            "detail": outcome.detail,
            "kind": outcome.kind,
            "tracking_id": outcome.tracking_id,
        }
        return web.json_response(body, status=STATUS_CODES.get(outcome.status, 200))

    def _authorize(self, request: web.Request, what: str = "feedback") -> web.Response | None:
        if not self.token:
            return _error(403, f"{what} over HTTP is closed: http.token is not configured")
        scheme, _, given = request.headers.get("Authorization", "").partition(" ")
        challenge = 'Bearer realm="mailweir"'
        counted = what == "feedback"  # refusals of other endpoints are no feedback refused
        if scheme.lower() != "bearer" or not given.strip():
            if counted:
                self.metrics.feedback_refused("unauthorized")
            return _error(
                401,
                "missing bearer token (Authorization: Bearer <token>)",
                {"WWW-Authenticate": challenge},
            )
        if not hmac.compare_digest(given.strip().encode(), self.token.encode()):
            if counted:
                self.metrics.feedback_refused("unauthorized")
            return _error(
                401,
                "wrong bearer token",
                {"WWW-Authenticate": challenge + ', error="invalid_token"'},
            )
        return None

    async def _parse_feedback(self, request: web.Request) -> FeedbackRequest:
        if request.content_length is not None and request.content_length > self._max_body:
            raise web.HTTPRequestEntityTooLarge(
                max_size=self._max_body, actual_size=request.content_length
            )
        client = request.remote or ""
        if request.content_type == "application/json":
            return _parse_json(await request.read(), client)
        if request.content_type == "message/rfc822":
            correction = _correction(request.query.get("kind"), "query parameter ?kind=")
            raw = await request.read()
            if not raw.strip():
                raise BadRequest("empty message/rfc822 body: send the misfiled message itself")
            return FeedbackRequest(correction, "http", raw=raw, client=client)
        raise BadRequest(
            f"unsupported Content-Type {request.content_type!r}: send application/json with "
            "a tracking id, or message/rfc822 with ?kind=spam|ham"
        )


def _correction(value: object, where: str) -> Any:
    if value not in CORRECTIONS:
        raise BadRequest(f'{where}kind must be "spam" or "ham", got {value!r}')
    return value


def _parse_json(body: bytes, client: str) -> FeedbackRequest:
    try:
        # RFC 8259 section 8.1: JSON between systems is UTF-8; json.loads(bytes) would guess.
        data = json.loads(body.decode("utf-8"))
    except UnicodeDecodeError as exc:
        raise BadRequest(f"body is not UTF-8 JSON: {exc}") from exc
    except json.JSONDecodeError as exc:
        raise BadRequest(
            f"malformed JSON: {exc.msg} at line {exc.lineno} column {exc.colno}"
        ) from exc
    except RecursionError as exc:  # "[[[[..." past the interpreter's depth: not a request
        raise BadRequest("malformed JSON: nested too deeply") from exc
    if not isinstance(data, dict):
        raise BadRequest(f"JSON body must be an object, got {type(data).__name__}")
    unknown = sorted(set(data) - {"tracking_id", "kind"})
    if unknown:
        raise BadRequest(f"unknown field(s) {unknown}; expected tracking_id and kind")
    tracking_id = data.get("tracking_id")
    if not isinstance(tracking_id, str) or not TRACKING_ID.fullmatch(tracking_id):
        raise BadRequest(
            f"tracking_id must be the id from the message's Mailweir-Id header field "
            f"(1-64 letters, digits, - or _), got {tracking_id!r}"
        )
    correction = _correction(data.get("kind"), "JSON field ")
    return FeedbackRequest(correction, "http", tracking_id=tracking_id, client=client)

"""The HTTP side over a real socket on 127.0.0.1, with aiohttp's client."""

from __future__ import annotations

import asyncio
from collections.abc import AsyncIterator, Awaitable, Callable
from dataclasses import dataclass, field

import aiohttp
import pytest
from prometheus_client.parser import text_string_to_metric_families

from mailweir.daemon.feedback_types import FeedbackOutcome, FeedbackRequest, FeedbackStatus
from mailweir.daemon.http_side import HttpSide
from mailweir.daemon.metrics import Metrics
from mailweir.store.errors import StoreBusy

TOKEN = "c2VjcmV0LWhhcmJvdXJsYW5l"
MESSAGE = (
    b"From: Tobias Lindqvist <tobias@harbourlane.example>\r\n"
    b"To: Priya Raman <priya@harbourlane.example>\r\n"
    b"Subject: Rota for the weekend clinic\r\n"
    b"\r\n"
    b"Priya, Dr. Okafor covers Saturday morning; please confirm the cat boarding slots.\r\n"
)


@dataclass
class FakeIntake:
    """Stands in for the feedback intake: records requests, answers a chosen status."""

    status: FeedbackStatus = FeedbackStatus.TRAINED
    error: Exception | None = None
    requests: list[FeedbackRequest] = field(default_factory=list)

    async def __call__(self, request: FeedbackRequest) -> FeedbackOutcome:
        self.requests.append(request)
        if self.error is not None:
            raise self.error
        return FeedbackOutcome(self.status, "done", "false_positive", request.tracking_id)


@dataclass
class Side:
    http: HttpSide
    url: str
    session: aiohttp.ClientSession
    intake: FakeIntake
    ready: dict[str, bool]

    def auth(self, token: str = TOKEN) -> dict[str, str]:
        return {"Authorization": f"Bearer {token}"}


async def start_side(
    token: str = TOKEN, max_body_bytes: int = 4096
) -> tuple[HttpSide, FakeIntake, dict[str, bool]]:
    intake = FakeIntake()
    ready = {"store": True, "smtp": True}

    def check(name: str) -> Callable[[], Awaitable[bool]]:
        async def run() -> bool:
            if name == "store" and not ready[name]:
                raise ConnectionError("database file is gone")
            return ready[name]

        return run

    async def page() -> str:
        return "<!doctype html><title>status</title><p>Harbour Lane & co</p>"

    http = HttpSide(
        Metrics(),
        token=token,
        feedback=intake,
        page=page,
        ready_checks={"store": check("store"), "smtp": check("smtp")},
        max_body_bytes=max_body_bytes,
    )
    await http.start("127.0.0.1", 0)
    return http, intake, ready


@pytest.fixture
async def side() -> AsyncIterator[Side]:
    http, intake, ready = await start_side()
    timeout = aiohttp.ClientTimeout(total=10)
    async with aiohttp.ClientSession(timeout=timeout) as session:
        yield Side(http, f"http://127.0.0.1:{http.port}", session, intake, ready)
    await http.stop()


def refused(side: Side, reason: str) -> float:
    text = side.http.metrics.render().decode()
    for family in text_string_to_metric_families(text):
        for sample in family.samples:
            if sample.name == "mailweir_feedback_refused_total" and sample.labels == {
                "reason": reason
            }:
                return sample.value
    raise AssertionError(reason)


async def test_http_binds_a_real_port(side: Side) -> None:
    assert side.http.port and side.http.port > 0


async def test_http_healthz(side: Side) -> None:
    async with side.session.get(side.url + "/healthz") as resp:
        assert resp.status == 200
        assert (await resp.json())["status"] == "alive"


async def test_http_readyz_ready(side: Side) -> None:
    async with side.session.get(side.url + "/readyz") as resp:
        body = await resp.json()
    assert resp.status == 200
    assert body["checks"] == {
        "store": {"ok": True, "detail": "ok"},
        "smtp": {"ok": True, "detail": "ok"},
    }


async def test_http_readyz_smtp_not_listening_is_503(side: Side) -> None:
    side.ready["smtp"] = False
    async with side.session.get(side.url + "/readyz") as resp:
        body = await resp.json()
    assert resp.status == 503
    assert body["status"] == "not ready"
    assert body["checks"]["smtp"]["ok"] is False and body["checks"]["store"]["ok"] is True


async def test_http_readyz_store_check_raising_is_503_with_reason(side: Side) -> None:
    side.ready["store"] = False
    async with side.session.get(side.url + "/readyz") as resp:
        body = await resp.json()
    assert resp.status == 503
    assert "database file is gone" in body["checks"]["store"]["detail"]


async def test_http_metrics_parse(side: Side) -> None:
    async with side.session.get(side.url + "/metrics") as resp:
        assert resp.status == 200
        assert resp.headers["Content-Type"].startswith("text/plain; version=0.0.4")
        text = await resp.text()
    names = {f.name for f in text_string_to_metric_families(text)}
    assert "mailweir_messages" in names and "mailweir_false_positive_rate" in names


async def test_http_status_page_is_html_without_outside_sources(side: Side) -> None:
    async with side.session.get(side.url + "/") as resp:
        assert resp.status == 200
        assert resp.content_type == "text/html"
        assert "default-src 'none'" in resp.headers["Content-Security-Policy"]
        assert "Harbour Lane" in await resp.text()


async def test_http_unknown_path_is_json_404(side: Side) -> None:
    async with side.session.get(side.url + "/nowhere") as resp:
        assert resp.status == 404
        assert "error" in await resp.json()


async def test_http_feedback_wrong_method_is_json_405_with_allow(side: Side) -> None:
    async with side.session.get(side.url + "/feedback") as resp:
        assert resp.status == 405
        assert "POST" in resp.headers["Allow"]
        assert "error" in await resp.json()


async def test_http_feedback_without_token_is_401(side: Side) -> None:
    body = {"tracking_id": "0abc", "kind": "ham"}
    async with side.session.post(side.url + "/feedback", json=body) as resp:
        assert resp.status == 401
        assert resp.headers["WWW-Authenticate"].startswith("Bearer")
        assert "missing bearer token" in (await resp.json())["error"]
    assert side.intake.requests == []
    assert refused(side, "unauthorized") == 1


async def test_http_feedback_wrong_token_is_401(side: Side) -> None:
    body = {"tracking_id": "0abc", "kind": "ham"}
    headers = side.auth(TOKEN + "x")
    async with side.session.post(side.url + "/feedback", json=body, headers=headers) as resp:
        assert resp.status == 401
        assert 'error="invalid_token"' in resp.headers["WWW-Authenticate"]
        assert (await resp.json())["error"] == "wrong bearer token"
    async with side.session.post(
        side.url + "/feedback", json=body, headers={"Authorization": f"Basic {TOKEN}"}
    ) as resp:
        assert resp.status == 401
    assert side.intake.requests == []


async def test_http_feedback_right_token_json_reaches_intake(side: Side) -> None:
    body = {"tracking_id": "0ljd4sr8c5q9ab12", "kind": "ham"}
    async with side.session.post(side.url + "/feedback", json=body, headers=side.auth()) as resp:
        assert resp.status == 200
        answer = await resp.json()
    assert answer == {
        "status": "trained",
        "detail": "done",
        "kind": "false_positive",
        "tracking_id": "0ljd4sr8c5q9ab12",
    }
    (request,) = side.intake.requests
    assert (request.correction, request.tracking_id, request.raw) == (
        "ham",
        body["tracking_id"],
        None,
    )
    assert request.channel == "http" and request.client == "127.0.0.1"


async def test_http_feedback_raw_message_with_kind(side: Side) -> None:
    headers = {**side.auth(), "Content-Type": "message/rfc822"}
    async with side.session.post(
        side.url + "/feedback?kind=spam", data=MESSAGE, headers=headers
    ) as resp:
        assert resp.status == 200
    (request,) = side.intake.requests
    assert request.raw == MESSAGE and request.correction == "spam" and request.tracking_id is None


async def test_http_feedback_raw_message_without_kind_is_400(side: Side) -> None:
    headers = {**side.auth(), "Content-Type": "message/rfc822"}
    async with side.session.post(side.url + "/feedback", data=MESSAGE, headers=headers) as resp:
        assert resp.status == 400
        assert "?kind=" in (await resp.json())["error"]


@pytest.mark.parametrize(
    ("body", "says"),
    [
        (b'{"tracking_id": "0abc", "kind": ', "malformed JSON"),
        (b"[1, 2]", "must be an object"),
        (b'{"tracking_id": "0abc", "kind": "maybe"}', "kind must be"),
        (b'{"kind": "spam"}', "tracking_id must be"),
        (b'{"tracking_id": "<script>", "kind": "spam"}', "tracking_id must be"),
        (b'{"tracking_id": "0abc", "kind": "spam", "note": 1}', "unknown field"),
        (b"\xff\xfe", "not UTF-8"),
    ],
)
async def test_http_feedback_bad_json_is_400(side: Side, body: bytes, says: str) -> None:
    headers = {**side.auth(), "Content-Type": "application/json"}
    async with side.session.post(side.url + "/feedback", data=body, headers=headers) as resp:
        assert resp.status == 400
        assert says in (await resp.json())["error"]
    assert side.intake.requests == []
    assert refused(side, "invalid") == 1


async def test_http_feedback_unsupported_content_type_is_400(side: Side) -> None:
    headers = {**side.auth(), "Content-Type": "text/plain"}
    async with side.session.post(side.url + "/feedback", data=b"hi", headers=headers) as resp:
        assert resp.status == 400
        assert "unsupported Content-Type" in (await resp.json())["error"]


async def test_http_feedback_oversize_is_413_json(side: Side) -> None:
    headers = {**side.auth(), "Content-Type": "message/rfc822"}
    big = MESSAGE + b"x" * 5000  # the fixture's limit is 4096 bytes
    async with side.session.post(
        side.url + "/feedback?kind=spam", data=big, headers=headers
    ) as resp:
        assert resp.status == 413
        assert "4096" in (await resp.json())["error"]
    assert side.intake.requests == []


async def test_http_feedback_oversize_chunked_is_413_json(side: Side) -> None:
    """No Content-Length: the limit must hold while reading, too."""

    async def chunks() -> AsyncIterator[bytes]:
        for _ in range(10):
            yield b"y" * 1000

    headers = {**side.auth(), "Content-Type": "message/rfc822"}
    async with side.session.post(
        side.url + "/feedback?kind=ham", data=chunks(), headers=headers
    ) as resp:
        assert resp.status == 413
        assert "error" in await resp.json()
    assert side.intake.requests == []


async def test_http_feedback_closed_without_configured_token() -> None:
    http, intake, _ = await start_side(token="")
    try:
        async with (
            aiohttp.ClientSession() as session,
            session.post(
                f"http://127.0.0.1:{http.port}/feedback",
                json={"tracking_id": "0abc", "kind": "ham"},
                headers={"Authorization": "Bearer "},
            ) as resp,
        ):
            assert resp.status == 403
            assert "http.token" in (await resp.json())["error"]
    finally:
        await http.stop()
    assert intake.requests == []


@pytest.mark.parametrize(
    ("status", "code"),
    [
        (FeedbackStatus.MOVED, 200),
        (FeedbackStatus.ALREADY_KNOWN, 200),
        (FeedbackStatus.NO_ORIGINAL, 404),
        (FeedbackStatus.RATE_LIMITED, 429),
        (FeedbackStatus.REFUSED, 403),
    ],
)
async def test_http_feedback_outcome_status_codes(
    side: Side, status: FeedbackStatus, code: int
) -> None:
    side.intake.status = status
    body = {"tracking_id": "0abc", "kind": "spam"}
    async with side.session.post(side.url + "/feedback", json=body, headers=side.auth()) as resp:
        assert resp.status == code
        assert (await resp.json())["status"] == status.value


async def test_http_feedback_store_busy_is_503(side: Side) -> None:
    side.intake.error = StoreBusy("database is locked")
    body = {"tracking_id": "0abc", "kind": "spam"}
    async with side.session.post(side.url + "/feedback", json=body, headers=side.auth()) as resp:
        assert resp.status == 503
        assert resp.headers["Retry-After"] == "30"
        assert "busy" in (await resp.json())["error"]


async def test_http_feedback_unexpected_error_is_json_500_and_logged(
    side: Side, caplog: pytest.LogCaptureFixture
) -> None:
    side.intake.error = RuntimeError("bug in the intake")
    body = {"tracking_id": "0abc", "kind": "spam"}
    async with side.session.post(side.url + "/feedback", json=body, headers=side.auth()) as resp:
        assert resp.status == 500
        answer = await resp.json()
    assert "bug in the intake" not in answer["error"]  # no internals to the client
    logged = [r.exc_info[1] for r in caplog.records if r.exc_info]
    assert any("bug in the intake" in str(exc) for exc in logged)


async def test_http_stop_closes_the_port() -> None:
    http, _, _ = await start_side()
    port = http.port
    await http.stop()
    with pytest.raises(OSError):
        _, writer = await asyncio.open_connection("127.0.0.1", port)
        writer.close()

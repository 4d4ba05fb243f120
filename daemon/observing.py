"""The HTTP side of a running daemon: metrics, health, readiness, status page, feedback.

Built after the SMTP side binds and stopped before it closes, on the same event loop.  The
``Metrics`` object is made first, because the SMTP handler and the judge count into it.
"""

from __future__ import annotations

import asyncio
from collections.abc import Callable
from typing import Any

from mailweir.daemon.feedback_types import FeedbackOutcome, FeedbackRequest
from mailweir.daemon.http_side import FeedbackHandler, HttpSide
from mailweir.daemon.metrics import Metrics, ReportRefresher
from mailweir.daemon.preload import memory_state
from mailweir.daemon.settings import HostPort, PolicySettings, Settings
from mailweir.daemon.status_page import StatusPage
from mailweir.store import reports


async def feedback_closed(request: FeedbackRequest) -> FeedbackOutcome:
    """Used when no feedback intake is configured: say so rather than pretend."""
    return FeedbackOutcome("refused", "feedback intake is not configured on this daemon")


class Observing:
    """Owns the HTTP side and the periodic refresh of the rate and model gauges."""

    def __init__(
        self,
        settings: Settings,
        metrics: Metrics,
        store: Any,
        policy: Callable[[], PolicySettings],
        smtp_serving: Callable[[], bool],
        feedback: FeedbackHandler | None,
    ) -> None:
        engine = store.engine

        def model_tokens() -> int:  # from memory, else counted by the database (token_count)
            return int(store.token_count())

        self.metrics = metrics
        self.refresher = ReportRefresher(
            metrics,
            rates=lambda window: reports.misfiling_rates(engine, window),
            model=lambda: reports.model_summary(engine, tokens=model_tokens()),
        )
        self.page = StatusPage(
            engine, policy, model_tokens=model_tokens, memory=lambda: memory_state(store)
        )

        async def store_ready() -> bool:
            return await asyncio.to_thread(reports.ping, engine)

        async def smtp_ready() -> bool:
            return smtp_serving()

        self.http = HttpSide(
            metrics,
            token=settings.http.token,
            feedback=feedback or feedback_closed,
            page=self.page.render,
            ready_checks={"store": store_ready, "smtp": smtp_ready},
            max_body_bytes=settings.smtp.max_message_bytes,
        )
        self._listen = settings.http.listen

    async def start(self) -> None:
        await self.refresher.start()
        try:
            await self.http.start(self._listen.host, self._listen.port)
        except BaseException:
            await self.refresher.stop()
            raise

    async def stop(self) -> None:
        await self.http.stop()
        await self.refresher.stop()

    @property
    def address(self) -> HostPort:
        return HostPort(self._listen.host, self.http.port or self._listen.port)

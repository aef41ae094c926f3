"""One database poller per watched job, shared by every open stream of that job.

A stream that polled the database on its own, on the shared thread pool, cost one
query every fraction of a second per open connection; a few hundred of them starved
the rest of the API. Here a job has at most one poller, which looks once a second
while anyone watches and stops when the last stream closes; streams wait on it and
cost nothing in between. The number of open streams is capped per key and in total
(``GROVEKEEPER_MAX_STREAMS_PER_KEY``, ``GROVEKEEPER_MAX_STREAMS``): past a cap a new
stream gets 429.

Reading the status before the trials means that once a terminal status is seen, every
trial the worker committed before finishing is read in the same pass, so the final
event comes last.
"""

from __future__ import annotations

import asyncio
import contextlib
import logging
from collections.abc import AsyncIterator, Callable
from typing import Any

import sqlalchemy as sa
from fastapi.concurrency import run_in_threadpool

from service import repository
from service.api.schemas import TrialOut
from service.db import session_scope
from service.errors import ServiceError
from service.tables import JobStatus, Trial

log = logging.getLogger("grovekeeper.api")
#: Never faster: one query pair a second per watched job, however many watch it.
POLL_SECONDS = 1.0
#: A waiting stream wakes this often to notice a client that went away.
IDLE_CHECK_SECONDS = 5.0


class TooManyStreams(ServiceError):
    status = 429
    code = "too_many_streams"
    title = "Too many open streams"


Snapshot = tuple[dict[str, Any], list[dict[str, Any]]]


def _poll(url: str, job_id: str, floor: int, seen: set[int],
          status_payload: Callable[[Any], dict[str, Any]],
          ) -> tuple[str, dict[str, Any], list[TrialOut]]:
    """The job's status, then its finished trials numbered ``floor`` or more not yet seen."""
    with session_scope(url) as session:
        job = repository.get_job(session, job_id)
        status, payload = job.status, status_payload(job)
        trials = session.scalars(
            sa.select(Trial).where(Trial.job_id == job_id, Trial.number >= floor)
            .order_by(Trial.number)).all()
        fresh = [TrialOut.model_validate(t, from_attributes=True)
                 for t in trials if t.number not in seen]
    return status, payload, fresh


class JobFeed:
    """What one poller has learnt about one job: its status and its trial events."""

    def __init__(self, url: str, job_id: str,
                 status_payload: Callable[[Any], dict[str, Any]]) -> None:
        self.url, self.job_id, self.status_payload = url, job_id, status_payload
        self.status: str | None = None
        self.payload: dict[str, Any] = {}
        self.trials: list[dict[str, Any]] = []  # trial event data, in the order found
        self.finished = False
        self.failed: BaseException | None = None
        self.version = 0
        self.changed = asyncio.Condition()
        self.watchers = 0
        self.task: asyncio.Task[None] | None = None

    async def run(self) -> None:
        seen: set[int] = set()
        floor = 0  # every trial below this number has been seen
        counts = {"complete": 0, "pruned": 0, "failed": 0}
        try:
            while True:
                status, payload, fresh = await run_in_threadpool(
                    _poll, self.url, self.job_id, floor, seen, self.status_payload)
                async with self.changed:
                    self.status, self.payload = status, payload
                    for trial in fresh:
                        seen.add(trial.number)
                        counts[trial.state] = counts.get(trial.state, 0) + 1
                        self.trials.append({
                            "job_id": self.job_id, **trial.model_dump(),
                            "trials_completed": counts["complete"],
                            "trials_pruned": counts["pruned"],
                            "trials_failed": counts["failed"]})
                    self.finished = JobStatus(status).is_finished()
                    self.version += 1
                    self.changed.notify_all()
                while floor in seen:
                    floor += 1
                if self.finished:
                    return
                await asyncio.sleep(POLL_SECONDS)
        except asyncio.CancelledError:
            raise
        except Exception as exc:  # noqa: BLE001 - handed to every stream, which ends
            log.warning("watching job %s failed: %s", self.job_id, exc)
            async with self.changed:
                self.failed = exc
                self.version += 1
                self.changed.notify_all()

    async def wait_past(self, version: int) -> None:
        async with self.changed:
            await self.changed.wait_for(lambda: self.version != version)


class WatchHub:
    """The feeds of the jobs being watched, and the stream counts behind the caps."""

    def __init__(self, url: str, *, per_key: int, total: int) -> None:
        self.url, self.per_key, self.total = url, per_key, total
        self.feeds: dict[str, JobFeed] = {}
        self.by_key: dict[str, int] = {}
        self.open = 0

    def _admit(self, who: str) -> None:
        if self.open >= self.total:
            raise TooManyStreams(f"the server has {self.total} streams open, its limit "
                                 "(GROVEKEEPER_MAX_STREAMS); try again later")
        if self.by_key.get(who, 0) >= self.per_key:
            raise TooManyStreams(f"this key has {self.per_key} streams open, the limit per "
                                 "key (GROVEKEEPER_MAX_STREAMS_PER_KEY); close one first")
        self.open += 1
        self.by_key[who] = self.by_key.get(who, 0) + 1

    def _leave(self, who: str, feed: JobFeed) -> None:
        self.open -= 1
        self.by_key[who] -= 1
        if not self.by_key[who]:
            del self.by_key[who]
        feed.watchers -= 1
        if not feed.watchers:
            if self.feeds.get(feed.job_id) is feed:
                del self.feeds[feed.job_id]
            if feed.task is not None:
                feed.task.cancel()

    def subscribe(self, job_id: str, who: str,
                  status_payload: Callable[[Any], dict[str, Any]]) -> Ticket:
        """Count a new stream of ``job_id`` for ``who`` (429 past a cap).

        Called before the response starts, so a refusal is a proper 429; the ticket
        gives the place back when released (more than once is harmless)."""
        self._admit(who)
        feed = self.feeds.get(job_id)
        if feed is None or feed.failed is not None:
            feed = self.feeds[job_id] = JobFeed(self.url, job_id, status_payload)
            feed.task = asyncio.get_running_loop().create_task(feed.run())
        feed.watchers += 1
        return Ticket(self, who, feed)

    async def events(self, ticket: Ticket,
                     disconnected: Callable[[], Any],
                     ) -> AsyncIterator[tuple[str, dict[str, Any]]]:
        """``(event, data)`` pairs for one stream: status changes, trials, the final
        status. Releases the stream's place when it ends, however it ends."""
        feed = ticket.feed
        sent = 0
        last_status: str | None = None
        version = 0
        try:
            while True:
                with contextlib.suppress(TimeoutError):
                    await asyncio.wait_for(feed.wait_past(version), IDLE_CHECK_SECONDS)
                if feed.version == version:  # only the idle check woke us
                    if await disconnected():
                        return
                    continue
                version = feed.version
                if feed.failed is not None:
                    return
                status, payload = feed.status, feed.payload
                if status != last_status and not feed.finished:
                    last_status = status
                    yield "status", {**payload, "final": False}
                while sent < len(feed.trials):
                    yield "trial", feed.trials[sent]
                    sent += 1
                if feed.finished:
                    yield "status", {**payload, "final": True}
                    return
                if await disconnected():
                    return
        finally:
            ticket.release()


class Ticket:
    """One open stream's place under the caps."""

    def __init__(self, hub: WatchHub, who: str, feed: JobFeed) -> None:
        self.hub, self.who, self.feed = hub, who, feed
        self.released = False

    def release(self) -> None:
        if not self.released:
            self.released = True
            self.hub._leave(self.who, self.feed)

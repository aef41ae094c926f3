"""The job heartbeat: a thread per job that keeps the claim alive and hears of a cancel
or of the job being handed to another worker."""

from __future__ import annotations

import logging
import threading
from dataclasses import dataclass, field

from service import queue
from service.db import session_scope

log = logging.getLogger("grovekeeper.worker")


@dataclass
class JobFlags:
    """What the heartbeat thread learns, read by the search between folds."""

    cancel: bool = False
    lost: bool = False
    done: threading.Event = field(default_factory=threading.Event)


def beat_until_done(url: str, job_id: str, worker_id: str, flags: JobFlags, *, lead: bool,
                    interval: float) -> None:
    """Beat every ``interval`` seconds until ``flags.done``; stop at once if the job is lost."""
    beat = queue.heartbeat if lead else queue.heartbeat_joiner
    while not flags.done.wait(interval):
        try:
            with session_scope(url) as session:
                ours, cancel = beat(session, job_id=job_id, worker_id=worker_id)
        except Exception as exc:  # noqa: BLE001 - a missed beat is retried next time
            log.warning("job %s: heartbeat failed: %s", job_id, exc)
            continue
        flags.cancel = flags.cancel or cancel
        if not ours:
            flags.lost = True
            return


def start(url: str, job_id: str, worker_id: str, *, lead: bool,
          interval: float) -> tuple[JobFlags, threading.Thread]:
    flags = JobFlags()
    thread = threading.Thread(target=beat_until_done, args=(url, job_id, worker_id, flags),
                              kwargs={"lead": lead, "interval": interval}, daemon=True)
    thread.start()
    return flags, thread


def stop(flags: JobFlags, thread: threading.Thread) -> None:
    flags.done.set()
    thread.join(timeout=5)

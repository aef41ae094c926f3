"""The job heartbeat: a thread per job that keeps the claim alive and hears of a cancel
or of the job being handed to another worker."""

from __future__ import annotations

import logging
import threading
from dataclasses import dataclass, field

from service import queue
from service.db import describe_outage, is_transient, session_scope

log = logging.getLogger("grovekeeper.worker")


@dataclass
class JobFlags:
    """What the heartbeat thread learns, read by the search between folds."""

    cancel: bool = False
    lost: bool = False
    done: threading.Event = field(default_factory=threading.Event)


def beat_until_done(url: str, job_id: str, worker_id: str, flags: JobFlags, *, lead: bool,
                    interval: float, epoch: int | None = None) -> None:
    """Beat every ``interval`` seconds until ``flags.done``; stop at once if the job is lost
    (a lead: its claim's ``epoch`` was superseded; a joiner: its row was swept)."""
    while not flags.done.wait(interval):
        try:
            with session_scope(url) as session:
                if lead:
                    ours, cancel = queue.heartbeat(session, job_id=job_id, worker_id=worker_id,
                                                   epoch=epoch)
                else:
                    ours, cancel = queue.heartbeat_joiner(session, job_id=job_id,
                                                          worker_id=worker_id)
        except Exception as exc:  # noqa: BLE001 - a missed beat is retried next time
            reason = describe_outage(exc) if is_transient(exc) else repr(exc)
            log.warning("job %s: heartbeat failed: %s", job_id, reason)
            continue
        if cancel and not flags.cancel:
            flags.cancel = True
            # Logged after the flag is set: trials started later stop before they train.
            log.info("job %s: cancel requested; the trials in flight stop at their next "
                     "boosting round", job_id)
        if not ours:
            log.warning("job %s: %s no longer holds the job; abandoning it", job_id, worker_id)
            flags.lost = True
            return


def start(url: str, job_id: str, worker_id: str, *, lead: bool, interval: float,
          epoch: int | None = None) -> tuple[JobFlags, threading.Thread]:
    flags = JobFlags()
    thread = threading.Thread(target=beat_until_done, args=(url, job_id, worker_id, flags),
                              kwargs={"lead": lead, "interval": interval, "epoch": epoch},
                              daemon=True)
    thread.start()
    return flags, thread


def stop(flags: JobFlags, thread: threading.Thread) -> None:
    flags.done.set()
    thread.join(timeout=5)

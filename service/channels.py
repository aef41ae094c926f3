"""Channels: stable names callers predict through. Moving one checks that callers of the
current model can call the new one unchanged; every move is recorded, as a channel event
and as an audit row (which key, from and to which model), in the move's transaction."""

from __future__ import annotations

import re
from typing import Any

from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import Session

from service import audit, repository
from service.db import session_scope
from service.errors import Conflict, NotFound, Unprocessable
from service.tables import Channel, Model

NAME = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.-]{0,99}$")


def check_name(name: str) -> None:
    if not NAME.match(name):
        message = ("a channel name is 1-100 letters, digits, '_', '.' or '-', starting with "
                   "a letter or digit")
        raise Unprocessable(message, errors=[{"field": "name", "message": message}])


def caller_changes(current: Model, new: Model) -> dict[str, list[str]]:
    """What callers of ``current`` would have to change to call ``new``: the columns to
    add, and columns whose kind differs. Columns ``new`` no longer uses are harmless
    (they are ignored and listed)."""
    old = {f["name"]: f["kind"] for f in current.feature_schema["features"]}
    now = {f["name"]: f["kind"] for f in new.feature_schema["features"]}
    return {"add": [c for c in now if c not in old],
            "kind_changed": [c for c in now if c in old and old[c] != now[c]]}


def _refuse(current: Model, new: Model) -> None:
    errors: list[dict[str, Any]] = []
    if current.task != new.task:
        errors.append({"field": "model_id", "message": f"the channel serves a {current.task} "
                       f"model; {new.id} is {new.task}"})
    changes = caller_changes(current, new)
    errors += [{"field": "model_id", "column": c,
                "message": f"callers would have to add column '{c}'"} for c in changes["add"]]
    errors += [{"field": "model_id", "column": c,
                "message": f"column '{c}' changes kind"} for c in changes["kind_changed"]]
    if errors:
        add = ", ".join(changes["add"]) or "none"
        raise Conflict(f"model {new.id} needs other input than {current.id} (columns to add: "
                       f"{add}); send \"force\": true to switch anyway", errors=errors)


def switch(url: str, name: str, model_id: str, *, force: bool = False, action: str = "set",
           key_id: str | None = None, job_id: str | None = None) -> Channel:
    """Point channel ``name`` at ``model_id`` and record it; refuses a model whose input
    differs from the current one's unless ``force``. A move to the model already there
    records nothing."""
    check_name(name)
    for attempt in range(2):
        try:
            with session_scope(url) as session:
                return _switch(session, name, model_id, force=force, action=action,
                               key_id=key_id, job_id=job_id)
        except IntegrityError:
            if attempt:  # two first moves raced; the second try finds the channel
                raise
    raise AssertionError("unreachable")


def _switch(session: Session, name: str, model_id: str, *, force: bool, action: str,
            key_id: str | None, job_id: str | None) -> Channel:
    try:
        new = repository.get_model(session, model_id)
    except NotFound as exc:
        raise Unprocessable(str(exc), errors=[{"field": "model_id",
                                               "message": "no such model"}]) from exc
    try:
        channel: Channel | None = repository.get_channel(session, name, lock=True)
    except NotFound:
        channel = None
    if channel is not None and channel.model_id == model_id:
        session.expunge(channel)
        return channel
    if channel is not None and not force:
        _refuse(repository.get_model(session, channel.model_id), new)
    channel_was = None if channel is None else channel.model_id
    if key_id is None and job_id is not None:
        key_id = audit.key_of_job(session, job_id)  # a promotion: the key that asked for it
    moved = repository.move_channel(session, channel=channel, name=name, model_id=model_id,
                                    action=action, forced=force, key_id=key_id, job_id=job_id)
    _audit(session, name, previous=channel_was,
           model_id=model_id, action=action, forced=force, key_id=key_id, job_id=job_id)
    session.commit()
    session.refresh(moved)
    session.expunge(moved)
    return moved


def rollback(url: str, name: str, *, key_id: str | None = None) -> Channel:
    """Point the channel at the model it had before its last move, as a new move."""
    with session_scope(url) as session:
        channel = repository.get_channel(session, name, lock=True)
        last = repository.last_channel_event(session, name=name)
        if last is None or last.previous_model_id is None:
            raise Conflict(f"channel {name!r} has had only one model; nothing to roll back to")
        previous = channel.model_id
        moved = repository.move_channel(session, channel=channel, name=name,
                                        model_id=last.previous_model_id, action="rollback",
                                        key_id=key_id)
        _audit(session, name, previous=previous, model_id=moved.model_id, action="rollback",
               forced=False, key_id=key_id, job_id=None)
        session.commit()
        session.refresh(moved)
        session.expunge(moved)
        return moved


def _audit(session: Session, name: str, *, previous: str | None, model_id: str, action: str,
           forced: bool, key_id: str | None, job_id: str | None) -> None:
    detail: dict[str, Any] = {"from": previous, "to": model_id}
    if forced:
        detail["forced"] = True
    if job_id is not None:
        detail["job_id"] = job_id
    audit.record(session, action=f"channel.{action}", target=name, key_id=key_id,
                 detail=detail)

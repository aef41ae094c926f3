"""The ``grovekeeper`` command: serve, worker, demo, keys."""

from __future__ import annotations

import argparse
import contextlib
import ipaddress
import logging
import os
import signal
import subprocess
import sys
import threading
from collections.abc import Iterator
from typing import Any

import uvicorn

from service.settings import Settings

log = logging.getLogger("grovekeeper")


def _settings(args: argparse.Namespace) -> Settings:
    overrides: dict[str, Any] = {}
    if getattr(args, "home", None):
        overrides["home"] = args.home
    if getattr(args, "database_url", None):
        overrides["database_url"] = args.database_url
    return Settings(**overrides)


def _setup_logging(settings: Settings) -> None:
    from service.logs import configure

    configure(settings.log_format)


def is_loopback(host: str) -> bool:
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False


def child_env(settings: Settings) -> dict[str, str]:
    """The environment of a worker process: same home and database, passive OpenMP."""
    env = dict(os.environ)
    env["GROVEKEEPER_HOME"] = str(settings.home.resolve())
    env["GROVEKEEPER_DATABASE_URL"] = settings.db_url
    env["GROVEKEEPER_LOG_FORMAT"] = settings.log_format
    # Idle OpenMP threads busy-wait by default and starve the other worker on a small
    # machine (LIBRARIES.md §3: 696 s vs 7 s); passive waiting costs nothing here.
    env["OMP_WAIT_POLICY"] = "passive"
    return env


class WorkerPool:
    """Worker subprocesses of ``serve``; a worker that dies is started again."""

    def __init__(self, settings: Settings, count: int) -> None:
        self.settings = settings
        self.count = count
        self.procs: list[subprocess.Popen[bytes]] = []
        self.stopping = threading.Event()
        self._watch = threading.Thread(target=self._supervise, daemon=True)

    def _spawn(self) -> subprocess.Popen[bytes]:
        env = child_env(self.settings)
        env["GROVEKEEPER_PARENT_PID"] = str(os.getpid())  # workers exit if serve dies
        return subprocess.Popen([sys.executable, "-m", "service", "worker"], env=env)

    def start(self) -> None:
        self.procs = [self._spawn() for _ in range(self.count)]
        self._watch.start()

    def _supervise(self) -> None:
        while not self.stopping.wait(2.0):
            for i, proc in enumerate(self.procs):
                if proc.poll() is not None and not self.stopping.is_set():
                    log.warning("worker pid %d exited with %s; starting another",
                                proc.pid, proc.returncode)
                    self.procs[i] = self._spawn()

    def stop(self, timeout: float = 60.0) -> None:
        """SIGTERM: each worker finishes or hands back its trial and releases its job."""
        self.stopping.set()
        for proc in self.procs:
            if proc.poll() is None:
                proc.send_signal(signal.SIGTERM)
        for proc in self.procs:
            try:
                proc.wait(timeout=timeout)
            except subprocess.TimeoutExpired:
                proc.kill()


def default_workers(cores: int | None = None) -> int:
    """Worker processes ``serve`` starts when not told: one per four cores, at least one.

    A job already uses every core of its worker (parallel trials on small tables, LightGBM
    threads on large ones), so one worker keeps a small machine busy; on a large one a few
    more let several jobs run at once without each being squeezed onto a core or two.
    """
    cores = cores if cores is not None else (os.cpu_count() or 1)
    return max(1, cores // 4)


def cmd_serve(args: argparse.Namespace) -> int:
    from service.api.app import create_app
    from service.auth import any_key_exists
    from service.db import init_db

    settings = _settings(args)
    _setup_logging(settings)
    settings.ensure_dirs()
    init_db(settings.db_url)  # once, here, so workers and API never race on the schema
    if not is_loopback(args.host) and not any_key_exists(settings.db_url):
        print(
            f"grovekeeper: refusing to listen on {args.host} while no API key exists; "
            "create one with 'grovekeeper keys create --scope admin'",
            file=sys.stderr,
        )
        return 2
    app = create_app(settings, init=False, loopback_only=is_loopback(args.host))
    server = _Server(uvicorn.Config(app, host=args.host, port=args.port, log_level="warning",
                                    timeout_graceful_shutdown=5))

    def _stop(_signum: int, _frame: Any) -> None:
        server.should_exit = True

    # Our own handlers: uvicorn's re-raise the signal after shutdown, which would kill
    # this process before it could stop its workers.
    signal.signal(signal.SIGTERM, _stop)
    signal.signal(signal.SIGINT, _stop)
    pool = WorkerPool(settings, default_workers() if args.workers is None else args.workers)
    pool.start()
    try:
        server.run()
    finally:
        pool.stop()
    return 0


class _Server(uvicorn.Server):
    @contextlib.contextmanager
    def capture_signals(self) -> Iterator[None]:
        yield  # cmd_serve handles the signals itself


def cmd_worker(args: argparse.Namespace) -> int:
    os.environ.setdefault("OMP_WAIT_POLICY", "passive")  # before LightGBM loads OpenMP
    from service import worker

    settings = _settings(args)
    _setup_logging(settings)
    worker.main(settings, parent_pid=settings.parent_pid)
    return 0


def cmd_demo(args: argparse.Namespace) -> int:
    from service.demo import run_demo

    return run_demo(trials=args.trials, keep=args.keep)


def cmd_migrate(args: argparse.Namespace) -> int:
    """Create or upgrade the schema (ours and Optuna's); the containers' prestart step."""
    import time

    from service.db import init_db, ping
    from service.migrations import SCHEMA_VERSION

    settings = _settings(args)
    settings.ensure_dirs()
    deadline = time.monotonic() + args.wait
    while True:  # a database container may still be starting
        try:
            ping(settings.db_url)
            break
        except Exception as exc:  # noqa: BLE001 - retried until the deadline
            if time.monotonic() > deadline:
                print(f"grovekeeper: database not reachable: {exc}", file=sys.stderr)
                return 1
            time.sleep(1)
    init_db(settings.db_url)
    print(f"schema at revision {SCHEMA_VERSION}", file=sys.stderr)
    return 0


def cmd_keys_create(args: argparse.Namespace) -> int:
    from service.auth import create_key
    from service.db import init_db

    settings = _settings(args)
    settings.ensure_dirs()
    init_db(settings.db_url)
    key_id, secret = create_key(settings.db_url, scope=args.scope)
    print(secret)
    print(f"key {key_id} ({args.scope}); shown once, only its hash is stored",
          file=sys.stderr)
    return 0


def cmd_keys_list(args: argparse.Namespace) -> int:
    from service.auth import list_keys
    from service.db import init_db

    settings = _settings(args)
    settings.ensure_dirs()
    init_db(settings.db_url)
    print(f"{'id':<28} {'scope':<6} {'created':<20} revoked")
    for key in list_keys(settings.db_url):
        revoked = key.revoked_at.strftime("%Y-%m-%d %H:%M:%S") if key.revoked_at else "-"
        print(f"{key.id:<28} {key.scope:<6} {key.created_at:%Y-%m-%d %H:%M:%S} {revoked}")
    return 0


def cmd_keys_revoke(args: argparse.Namespace) -> int:
    from service.auth import revoke_key
    from service.db import init_db

    settings = _settings(args)
    init_db(settings.db_url)
    if not revoke_key(settings.db_url, args.key_id):
        print(f"grovekeeper: no active key with id {args.key_id}", file=sys.stderr)
        return 1
    print(f"key {args.key_id} revoked", file=sys.stderr)
    return 0


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="grovekeeper",
        description="Tune LightGBM models on uploaded tables and serve the winners.",
    )
    sub = parser.add_subparsers(dest="command", required=True)

    def common(p: argparse.ArgumentParser) -> None:
        p.add_argument("--home", help="data folder (default $GROVEKEEPER_HOME or "
                       "./grovekeeper-data)")
        p.add_argument("--database-url", help="SQLAlchemy URL (default SQLite in the home)")

    serve = sub.add_parser("serve", help="run the HTTP API and tuning workers")
    common(serve)
    serve.add_argument("--host", default="127.0.0.1")
    serve.add_argument("--port", type=int, default=8000)
    serve.add_argument("--workers", type=int, default=None,
                       help="tuning worker processes to start beside the API (default: "
                       "one per four cores, at least one; each job uses every core)")
    serve.set_defaults(func=cmd_serve)

    work = sub.add_parser("worker", help="run one tuning worker against the database")
    common(work)
    work.set_defaults(func=cmd_worker)

    demo = sub.add_parser("demo", help="tune the demo tables end to end in a temporary home")
    demo.add_argument("--trials", type=int, default=30, help="trial budget per job")
    demo.add_argument("--keep", action="store_true", help="keep the temporary home")
    demo.set_defaults(func=cmd_demo)

    migrate = sub.add_parser("migrate", help="create or upgrade the database schema")
    common(migrate)
    migrate.add_argument("--wait", type=float, default=0,
                         help="seconds to wait for the database to accept connections")
    migrate.set_defaults(func=cmd_migrate)

    keys = sub.add_parser("keys", help="manage API keys")
    keys_sub = keys.add_subparsers(dest="keys_command", required=True)
    create = keys_sub.add_parser("create", help="print a new API key once")
    common(create)
    create.add_argument("--scope", choices=["read", "write", "admin"], required=True)
    create.set_defaults(func=cmd_keys_create)
    listing = keys_sub.add_parser("list", help="list keys (ids, scopes, dates; never secrets)")
    common(listing)
    listing.set_defaults(func=cmd_keys_list)
    revoke = keys_sub.add_parser("revoke", help="revoke a key; every API process stops "
                                 "accepting it at its next request")
    common(revoke)
    revoke.add_argument("key_id", help="the key's id, as 'keys list' shows it")
    revoke.set_defaults(func=cmd_keys_revoke)

    from client.cli import register  # upload, tune, board, predict, ...

    register(sub)
    return parser


def main(argv: list[str] | None = None) -> None:
    args = build_parser().parse_args(argv)
    if (getattr(args, "workers", 1) or 0) < 0:
        print("grovekeeper: --workers must be 0 or more", file=sys.stderr)
        sys.exit(2)
    sys.exit(args.func(args))

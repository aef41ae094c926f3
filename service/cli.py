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
import time
from collections.abc import Iterator
from datetime import datetime, timedelta
from pathlib import Path
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
    # machine (docs/measured-facts.md §3: 696 s vs 7 s); passive waiting costs nothing here.
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
        next_prune = time.monotonic() + 60.0  # the first a minute after start
        while not self.stopping.wait(2.0):
            for i, proc in enumerate(self.procs):
                if proc.poll() is not None and not self.stopping.is_set():
                    log.warning("worker pid %d exited with %s; starting another",
                                proc.pid, proc.returncode)
                    self.procs[i] = self._spawn()
            if time.monotonic() >= next_prune:
                next_prune = time.monotonic() + self.settings.retention_every_hours * 3600
                self._retention()

    def _retention(self) -> None:
        from service.housekeeping import prune

        try:
            prune(self.settings, trials_days=self.settings.retain_trials_days)
        except Exception:  # noqa: BLE001 - retention is housekeeping: log, retry later
            log.exception("retention failed; it runs again at its next interval")

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
    from service.memory import arrow_returns_memory, limit_malloc_arenas

    limit_malloc_arenas()  # before uvicorn's threads start (see service/memory.py)
    arrow_returns_memory()  # before pyarrow loads; the workers inherit it
    settings = _settings(args)
    _setup_logging(settings)
    settings.ensure_dirs()
    init_db(settings.db_url)  # once, here, so workers and API never race on the schema
    from service.storage import ArtifactStore

    # Temporary files of an earlier life of this server (kill -9 mid-upload) go now.
    ArtifactStore(settings.artifacts_url, settings.tmp_dir).sweep_temp()
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
    from service.memory import arrow_returns_memory

    os.environ.setdefault("OMP_WAIT_POLICY", "passive")  # before LightGBM loads OpenMP
    arrow_returns_memory()  # before pyarrow loads (see service/memory.py)
    # Before pyarrow loads: Arrow allocates through malloc, which returns what a read of
    # a table freed (service/memory.py); its own pool (mimalloc) keeps it.
    os.environ.setdefault("ARROW_DEFAULT_MEMORY_POOL", "system")
    from service import worker

    settings = _settings(args)
    _setup_logging(settings)
    worker.main(settings, parent_pid=settings.parent_pid)
    return 0


def cmd_demo(args: argparse.Namespace) -> int:
    from service.demo import run_demo

    return run_demo(trials=args.trials, keep=args.keep, log=args.log,
                    with_key=args.with_key, serve=args.serve)


def cmd_migrate(args: argparse.Namespace) -> int:
    """Create or upgrade the schema (ours and Optuna's); the containers' prestart step."""

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
    key_id, secret = create_key(settings.db_url, scope=args.scope, expires_in=args.expires_in)
    print(secret)
    until = f", expires in {args.expires_in}" if args.expires_in else ""
    print(f"key {key_id} ({args.scope}{until}); shown once, only its hash is stored",
          file=sys.stderr)
    return 0


def cmd_backup(args: argparse.Namespace) -> int:
    from service.db import init_db, is_sqlite
    from service.housekeeping import backup

    settings = _settings(args)
    init_db(settings.db_url)
    if not is_sqlite(settings.db_url):
        print("grovekeeper: PostgreSQL is copied with pg_dump (see README, Backups); run it "
              "first, then this command copies the artifacts its rows refer to",
              file=sys.stderr)
    try:
        report = backup(settings, Path(args.dest))
    except ValueError as exc:
        print(f"grovekeeper: {exc}", file=sys.stderr)
        return 2
    what = "database and " if report.database else ""
    print(f"copied the {what}{report.artifacts} artifact file(s) to {args.dest}",
          file=sys.stderr)
    for key in report.missing:
        print(f"grovekeeper: {key} was deleted while the copy ran; its row is in the copy",
              file=sys.stderr)
    return 0


def cmd_prune(args: argparse.Namespace) -> int:
    from service.db import init_db
    from service.housekeeping import prune

    settings = _settings(args)
    init_db(settings.db_url)
    days = args.trials_days if args.trials_days is not None else settings.retain_trials_days
    report = prune(settings, trials_days=days)
    print(f"deleted the trials of {report.jobs} finished job(s) ({report.trials} rows) and "
          f"{len(report.files)} unreferenced file(s)", file=sys.stderr)
    return 0


def duration(text: str) -> timedelta:
    """``90s``, ``30m``, ``12h``, ``7d`` or plain seconds, for ``keys create --expires-in``."""
    units = {"s": 1, "m": 60, "h": 3600, "d": 86400}
    number, unit = (text[:-1], text[-1]) if text and text[-1] in units else (text, "s")
    try:
        seconds = float(number) * units[unit]
    except ValueError:
        raise argparse.ArgumentTypeError(
            f"'{text}' is not a duration (e.g. 90s, 30m, 12h, 7d)") from None
    if seconds <= 0:
        raise argparse.ArgumentTypeError("the duration must be positive")
    return timedelta(seconds=seconds)


def cmd_keys_list(args: argparse.Namespace) -> int:
    from service.auth import list_keys
    from service.db import init_db

    settings = _settings(args)
    settings.ensure_dirs()
    init_db(settings.db_url)
    def when(stamp: datetime | None) -> str:
        return stamp.strftime("%Y-%m-%d %H:%M:%S") if stamp else "-"

    print(f"{'id':<28} {'scope':<6} {'created':<20} {'expires':<20} {'last used':<20} revoked")
    for key in list_keys(settings.db_url):
        print(f"{key.id:<28} {key.scope:<6} {when(key.created_at):<20} "
              f"{when(key.expires_at):<20} {when(key.last_used_at):<20} "
              f"{when(key.revoked_at)}")
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
    demo.add_argument("--log", type=Path, metavar="PATH",
                      help="where the server's and workers' log lines go (default: "
                           "grovekeeper-demo-TIME.log in the temporary directory)")
    demo.add_argument("--with-key", action="store_true",
                      help="give the demo server an API key, as a shared server has; the "
                           "report pages are then signed links")
    demo.add_argument("--serve", action="store_true",
                      help="keep the server running after the demo (Ctrl-C stops it) so "
                           "the report pages can be opened")
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
    create.add_argument("--expires-in", type=duration, default=None, metavar="DURATION",
                        help="the key stops working after this long (90s, 30m, 12h, 7d); "
                        "default: never")
    create.set_defaults(func=cmd_keys_create)
    listing = keys_sub.add_parser("list", help="list keys (ids, scopes, dates; never secrets)")
    common(listing)
    listing.set_defaults(func=cmd_keys_list)
    revoke = keys_sub.add_parser("revoke", help="revoke a key; every API process stops "
                                 "accepting it at its next request")
    common(revoke)
    revoke.add_argument("key_id", help="the key's id, as 'keys list' shows it")
    revoke.set_defaults(func=cmd_keys_revoke)

    back = sub.add_parser("backup", help="copy the database (SQLite) and its artifacts into "
                          "a new folder while the service runs")
    common(back)
    back.add_argument("dest", help="a new or empty folder")
    back.set_defaults(func=cmd_backup)
    prune_p = sub.add_parser("prune", help="apply the retention settings once")
    common(prune_p)
    prune_p.add_argument("--trials-days", type=float, default=None,
                         help="delete trials of jobs finished more than this many days ago "
                         "(default $GROVEKEEPER_RETAIN_TRIALS_DAYS; unset keeps them)")
    prune_p.set_defaults(func=cmd_prune)

    from client.cli import register  # upload, tune, board, predict, ...

    register(sub)
    return parser


def main(argv: list[str] | None = None) -> None:
    args = build_parser().parse_args(argv)
    if (getattr(args, "workers", 1) or 0) < 0:
        print("grovekeeper: --workers must be 0 or more", file=sys.stderr)
        sys.exit(2)
    sys.exit(args.func(args))

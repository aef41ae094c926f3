"""Client commands of ``grovekeeper``, against a running server.

``upload``, ``datasets``, ``tune``, ``watch``, ``status``, ``cancel``, ``jobs``,
``board``, ``model``, ``predict``, ``report``, ``delete``. The server comes from
``--url`` or GROVEKEEPER_URL, the key from ``--api-key`` or GROVEKEEPER_API_KEY
(client/settings.py).
Every failure leaves with a documented exit code and one line on stderr.
"""

from __future__ import annotations

import argparse
import sys
from collections.abc import Callable
from pathlib import Path
from typing import Any, NoReturn
from urllib.parse import unquote

from client import commands as jobs
from client import http as client
from client.http import Api, ClientError, fmt, table
from client.job_options import add_job_options, read_columns, read_kind
from client.settings import ClientSettings
from vocabulary import DECLARED_KINDS, JOB_STATUSES, UNSEEN_POLICIES

Command = Callable[[argparse.Namespace], int]


def cmd_model(args: argparse.Namespace) -> int:
    with Api(args.url, args.api_key, timeout=args.timeout) as api:
        model = api.get(f"/v1/models/{args.model_id}")
        job = api.get(f"/v1/jobs/{model['job_id']}")
        jobs.warn(data=job.get("warnings"), winner=jobs.winner_warnings(model))
        if args.save_model:
            _save(api, f"/v1/models/{args.model_id}/file", args.save_model)
        if args.save_bundle:
            _save(api, f"/v1/models/{args.model_id}/bundle", args.save_bundle)
    if args.format == "json":
        jobs._emit(model)
        return client.OK
    lines = [
        f"model      {model['id']}  (job {model['job_id']}, trial {model['trial_number']})",
        f"task       {model['task']} on {model['target']!r}, metric {model['metric']}",
        f"rounds     {model['boosting_rounds']}",
        "cv         " + _scores(model["cv"]),
        "hold-out   " + _scores(model["holdout"]) + f"  ({model['holdout_rows']} rows)",
        "params     " + "  ".join(f"{k}={fmt(v)}" for k, v in sorted(model["params"].items())
                                  if k not in _PLUMBING),
        f"sha256     {model['sha256']}",
        "",
    ]
    sys.stdout.write("\n".join(lines))
    importance = model["feature_importance"][: args.top]
    if importance:
        header = list(importance[0])
        sys.stdout.write("\n" + table(header, [[row[h] for h in header] for row in importance]))
    return client.OK


# Parameters every model shares (tuner/_lgb.py base_params) say nothing about this one.
_PLUMBING = {"verbosity", "num_threads", "seed", "deterministic", "force_col_wise",
             "feature_pre_filter"}


def _scores(scores: dict[str, Any]) -> str:
    return "  ".join(f"{k} {fmt(v)}" for k, v in scores.items()
                     if isinstance(v, int | float | str))


def _save(api: Api, path: str, target: str) -> None:
    data = api.request("GET", path).content
    Path(target).write_bytes(data)
    print(f"wrote {target} ({len(data)} bytes)", file=sys.stderr)


def cmd_predict(args: argparse.Namespace) -> int:
    if args.file == "-":
        body = sys.stdin.buffer.read()
    else:
        source = Path(args.file)
        if not source.is_file():
            raise ClientError(client.USAGE, f"no such file: {source}")
        body = source.read_bytes()
    with Api(args.url, args.api_key, timeout=args.timeout) as api:
        params: dict[str, str] = {"unseen": args.unseen}
        if args.explain:
            params["explain"] = "true"
        if args.keep:
            params["keep"] = ",".join(args.keep)
        response = api.request("POST", f"/v1/models/{args.model_id}/predictions",
                               content=body, params=params,
                               headers={"Content-Type": "text/csv", "Accept": "text/csv"})
    if response.headers.get("x-ignored-columns"):
        names = [unquote(n) for n in response.headers["x-ignored-columns"].split(",")]
        print(f"ignored columns: {', '.join(names)}", file=sys.stderr)
    if args.output:
        Path(args.output).write_bytes(response.content)
        rows = max(response.text.count("\n") - 1, 0)
        print(f"wrote {rows} predictions to {args.output}", file=sys.stderr)
    else:
        sys.stdout.write(response.text)
    return client.OK


def cmd_report(args: argparse.Namespace) -> int:
    body = {} if args.expires_in is None else {"expires_in": args.expires_in}
    with Api(args.url, args.api_key, timeout=args.timeout) as api:
        link = api.post(f"/v1/jobs/{args.job_id}/report-links", json=body)
    if args.format == "json":
        jobs._emit(link)
    else:
        print(link["url"])
        print(f"opens without a key until {link['expires_at']}", file=sys.stderr)
    if args.open:
        import webbrowser

        if not webbrowser.open(link["url"]):
            print("no browser to open it in; copy the link above", file=sys.stderr)
    return client.OK


# -- the parser ------------------------------------------------------------------


def _one_line_error(parser: argparse.ArgumentParser) -> None:
    def error(message: str) -> NoReturn:
        print(f"{parser.prog}: {message} (see --help)", file=sys.stderr)
        sys.exit(client.USAGE)

    parser.error = error  # type: ignore[method-assign]


def _run(func: Command) -> Command:
    def run(args: argparse.Namespace) -> int:
        try:
            return func(args)
        except ClientError as exc:
            print(f"grovekeeper {args.command}: {exc.reason}", file=sys.stderr)
            return exc.code
        except OSError as exc:  # unreadable input, unwritable output
            print(f"grovekeeper {args.command}: {exc}", file=sys.stderr)
            return client.USAGE

    return run


def _positive(kind: type) -> Callable[[str], Any]:
    def parse(text: str) -> Any:
        try:
            value = kind(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"expected a number, got {text!r}") from None
        if value <= 0:
            raise argparse.ArgumentTypeError(f"must be more than 0, got {text}")
        return value

    return parse


def register(sub: Any) -> None:
    """Add the client commands to ``grovekeeper``'s subparsers (called by cli.py)."""
    defaults = ClientSettings()

    def add(name: str, func: Command, help_: str, formats: tuple[str, ...]) -> Any:
        p = sub.add_parser(name, help=help_, description=help_[0].upper() + help_[1:] + ".",
                           epilog=client.EXIT_CODES)
        _one_line_error(p)
        p.add_argument("--url", default=defaults.url,
                       help=f"server address (default $GROVEKEEPER_URL or {defaults.url})")
        p.add_argument("--api-key", default=defaults.api_key,
                       help="bearer key (default $GROVEKEEPER_API_KEY; none on loopback)")
        p.add_argument("--timeout", type=_positive(float), default=60.0,
                       help="seconds to wait for each answer (default 60)")
        p.add_argument("-f", "--format", choices=formats, default=formats[0],
                       help=f"what to print on stdout (default {formats[0]})")
        p.set_defaults(func=_run(func))
        return p

    p = add("upload", jobs.cmd_upload, "upload a CSV or Parquet table; prints its dataset id",
            ("id", "json"))
    p.add_argument("file", help="the table (.csv, or .parquet)")
    p.add_argument("--name", help="dataset name (default: the file name without extension)")
    p.add_argument("--kind", action="append", type=read_kind, metavar="COLUMN=KIND",
                   help=f"declare a column's kind ({', '.join(DECLARED_KINDS)}); categorical "
                        "and text keep their text exactly, e.g. store_id=categorical "
                        "(repeatable)")

    p = add("datasets", jobs.cmd_datasets, "list datasets, newest first",
            ("table", "csv", "json"))
    p.add_argument("--limit", type=_positive(int), default=50, help="at most this many")

    p = add("tune", jobs.cmd_tune, "queue a tuning job on a dataset; prints its job id",
            ("id", "json"))
    p.add_argument("dataset_id", help="the dataset to tune on (from 'grovekeeper upload')")
    add_job_options(p)
    p.add_argument("--wait", action="store_true",
                   help="follow the job with a live progress line on stderr until it ends; "
                        "exit 1 unless it succeeded")
    p.add_argument("--interval", type=_positive(float), default=0.5,
                   help="seconds between progress checks with --wait (default 0.5)")
    p.add_argument("--print", choices=["job", "model"], default="job",
                   help="which id goes to stdout: the job's (default) or, with --wait, the "
                        "winning model's, so MODEL=$(grovekeeper tune ... --wait --print "
                        "model) needs no parsing")

    p = add("watch", jobs.cmd_watch, "follow a job's progress until it ends; prints its "
            "final status", ("status", "json"))
    p.add_argument("job_id")
    p.add_argument("--interval", type=_positive(float), default=0.5,
                   help="seconds before looking again when the stream drops (default 0.5)")

    p = add("status", jobs.cmd_status, "show one job as 'key value' lines", ("text", "json"))
    p.add_argument("job_id")

    p = add("cancel", jobs.cmd_cancel, "cancel a queued or running job", ("text",))
    p.add_argument("job_id")

    p = add("jobs", jobs.cmd_jobs, "list jobs, newest first", ("table", "csv", "json"))
    p.add_argument("--status", choices=JOB_STATUSES, help="only jobs in this status")
    p.add_argument("--limit", type=_positive(int), default=50, help="at most this many")

    p = add("board", jobs.cmd_board, "show a job's leaderboard, best trial first",
            ("table", "csv", "json"))
    p.add_argument("job_id")
    p.add_argument("--limit", type=_positive(int), help="only the best N trials")

    p = add("model", cmd_model, "show a model's report: scores, parameters, importance",
            ("text", "json"))
    p.add_argument("model_id")
    p.add_argument("--top", type=_positive(int), default=10,
                   help="features to list by importance (default 10)")
    p.add_argument("--save-model", metavar="PATH", help="also write the LightGBM text model")
    p.add_argument("--save-bundle", metavar="PATH",
                   help="also write the hand-off zip (model, schema, predict.py, ...)")

    p = add("report", cmd_report, "print a signed link to a job's report page that opens "
            "without a key until it expires", ("url", "json"))
    p.add_argument("job_id")
    p.add_argument("--open", action="store_true", help="also open it in a web browser")
    p.add_argument("--expires-in", type=_positive(int), metavar="SECONDS",
                   help="how long the link stays valid (server default 900, at most 86400)")

    p = add("predict", cmd_predict, "predict the rows of a CSV file; CSV to stdout",
            ("csv",))
    p.add_argument("model_id")
    p.add_argument("file", help="CSV with the feature columns ('-' reads stdin)")
    p.add_argument("-o", "--output", metavar="PATH", help="write the predictions here instead")
    p.add_argument("--unseen", choices=UNSEEN_POLICIES, default="error",
                   help="categories not seen in training: refuse (default) or treat as "
                        "missing")
    p.add_argument("--explain", action="store_true",
                   help="add each row's TreeSHAP contributions (a bias column, then one "
                        "column per model input)")
    p.add_argument("--keep", type=read_columns, metavar="COL,COL,...",
                   help="columns of the input to repeat, exactly as sent, before the "
                        "predictions (e.g. your row ids)")

    p = add("delete", jobs.cmd_delete, "delete a dataset (refused while a queued or running "
            "job uses it) or a model (refused while a channel serves it); needs an admin key",
            ("text",))
    p.add_argument("kind", choices=sorted(jobs.DELETABLE))
    p.add_argument("id", help="the dataset's or model's id")

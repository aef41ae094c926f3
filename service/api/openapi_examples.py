"""Request and response examples for every route, attached to the OpenAPI document.

Kept in one table apart from the routes so the route modules stay short, and so a test
can check that no route is left without them (tests/service/test_openapi_examples.py).
"""

from __future__ import annotations

from typing import Any

from fastapi import FastAPI

from service.api import paging
from service.api.problems import PROBLEM
from service.errors import TYPE_BASE

DATASET = {
    "id": "ds_0123abcd4567ef89", "name": "kilns", "rows": 1200, "n_columns": 13,
    "size_bytes": 98304, "sha256": "9f2c…", "source_format": "csv",
    "created_at": "2026-03-14T09:30:00Z",
    "columns": [
        {"name": "peak_temp_c", "kind": "numeric", "missing": 0, "distinct": 410,
         "dtype": "float64", "declared": None},
        {"name": "clay_body", "kind": "categorical", "missing": 0, "distinct": 4,
         "dtype": "str", "declared": None},
    ],
    "warnings": ["column 'firing_id' looks like an ID (every value is unique)"],
}
PROGRESS = {"trials_completed": 17, "trials_pruned": 4, "trials_failed": 0,
            "trials_budget": 40, "best_score": 0.8712, "best_trial_number": 11,
            "elapsed_seconds": 42.5, "eta_seconds": 38.5,
            "trials_by_fidelity": {"0.1111": 9, "0.3333": 3, "1": 9}}
JOB: dict[str, Any] = {
    "id": "job_89ab01cd23ef4567", "dataset_id": DATASET["id"], "status": "running",
    "priority": 0, "target": "defect", "task": "binary", "metric": "roc_auc",
    "direction": "maximize",
    "spec": {"target": "defect", "task": "binary", "metric": "roc_auc",
             "budget": {"trials": 40, "seconds": None}},
    "progress": PROGRESS, "model_id": None, "promotion": None, "error": None, "problem": None,
    "warnings": [], "cancel_requested": False, "attempts": 1, "max_workers": 1,
    "created_at": "2026-03-14T09:31:00Z",
    "started_at": "2026-03-14T09:31:01Z", "finished_at": None,
}
# A row of the jobs list: the job without its stored request, warnings, problem or promotion.
JOB_SUMMARY = {k: v for k, v in JOB.items()
               if k not in ("spec", "warnings", "problem", "promotion")}
PARAMS = {"learning_rate": 0.052, "num_leaves": 31, "min_data_in_leaf": 20,
          "feature_fraction": 0.8, "lambda_l2": 0.01}
TRIAL = {"number": 11, "state": "complete", "params": PARAMS, "score": 0.8712,
         "score_std": 0.0121, "fold_scores": [0.861, 0.879, 0.868, 0.884, 0.864],
         "best_iterations": [88, 102, 95, 91, 110], "boosting_rounds": 97,
         "duration_seconds": 1.8, "train_seconds": 1.5, "score_se": 0.0054, "fidelity": 1.0}
# A page's "next" is opaque: pass it back as ?cursor= (null on the last page).
NEXT_JOBS = paging.encode("jobs", (JOB["created_at"].replace("Z", "+00:00"), JOB["id"]))
NEXT_TRIALS = paging.encode("trials", (TRIAL["number"],))
LEADERBOARD = {"items": [{"rank": 1, "number": 11, "score": 0.8712, "score_std": 0.0121,
                          "score_se": 0.0054, "params": PARAMS, "boosting_rounds": 97}],
               "total": 17, "next": paging.encode("leaderboard", (0.8712, 11, 1)),
               "job_id": JOB["id"], "metric": "roc_auc", "direction": "maximize"}
HOLDOUT = {"roc_auc": 0.8655, "log_loss": 0.391, "average_precision": 0.642,
           "accuracy": 0.8542, "f1_macro": 0.7311}
MODEL = {
    "id": "mdl_4567cdef89ab0123", "job_id": JOB["id"], "task": "binary", "metric": "roc_auc",
    "target": "defect", "params": PARAMS, "boosting_rounds": 97, "trial_number": 11,
    "cv": {"metric": "roc_auc", "mean": 0.8712, "std": 0.0121, "se": 0.0054,
           "fold_scores": [0.861, 0.879, 0.868, 0.884, 0.864]},
    # Scores only (metric -> number); the rows and each score's interval sit beside it.
    "holdout": HOLDOUT,
    "holdout_rows": 240,
    "holdout_intervals": {
        name: {"estimate": value, "low": round(value - 0.04, 4), "high": round(value + 0.04, 4),
               "std_error": 0.0204, "level": 0.95, "resamples": 1000}
        for name, value in HOLDOUT.items()},
    "feature_schema": {"features": [
        {"name": "peak_temp_c", "kind": "numeric", "levels": None},
        {"name": "clay_body", "kind": "categorical",
         "levels": ["earthenware", "porcelain", "raku", "stoneware"]}]},
    "classes": [0, 1],
    "feature_importance": [{"feature": "peak_temp_c", "gain": 812.4, "split": 140}],
    "details": {},
    "decision": {"threshold": 0.23, "method": "out_of_fold", "false_positive_cost": 1.0,
                 "false_negative_cost": 5.0,
                 "note": "probabilities not calibrated: the cut with the least cost on 768 "
                         "out-of-fold search rows (never the hold-out)",
                 "holdout": {"rows": 240, "expected_cost_per_row": 0.41,
                             "expected_cost_per_row_at_0_5": 0.62}},
    "sha256": "c0ffee…", "size_bytes": 48211,
    "created_at": "2026-03-14T09:33:00Z",
}
MODEL_SUMMARY = {k: MODEL[k] for k in ("id", "job_id", "task", "metric", "target",
                                        "boosting_rounds", "trial_number", "cv", "holdout",
                                        "holdout_rows", "sha256", "created_at")
                 } | {"dataset_id": DATASET["id"]}
ROW = {"kiln": "north", "clay_body": "raku", "peak_temp_c": 1240, "ramp_rate_c_per_h": 150,
       "hold_minutes": 20, "cooling_rate_c_per_h": 120, "humidity_pct": 55,
       "glaze_thickness_mm": 0.8, "load_fraction": 0.7, "shelf_position": "middle",
       "fired_on": "2026-03-14"}
PREDICTIONS = {"model_id": MODEL["id"], "predictions": [0], "classes": [0, 1],
               "probabilities": [[0.83, 0.17]], "ignored_columns": [],
               "contributions": None, "contribution_scale": None}

JSON = "application/json"
CSV = "text/csv"
SCORING = {"id": "scr_2b2b2b2b2b2b2b2b", "model_id": MODEL["id"], "channel": None,
           "dataset_id": DATASET["id"], "keep": ["firing_id"], "unseen": "error",
           "status": "queued",
           "progress": {"rows_done": 0, "rows_total": 1000000, "fraction": 0.0},
           "error": None, "result_url": None, "cancel_requested": False, "attempts": 0,
           "created_at": "2026-04-02T08:10:00Z", "started_at": None, "finished_at": None}
COMPARISON = {
    "id": "cmp_3c3c3c3c3c3c3c3c", "models": [MODEL["id"], "mdl_0f1e2d3c4b5a6978"],
    "dataset_id": DATASET["id"], "status": "succeeded", "error": None,
    "result": {"models": [MODEL["id"], "mdl_0f1e2d3c4b5a6978"], "rows": 1200,
               "metric": "roc_auc", "direction": "maximize",
               "scores": {MODEL["id"]: 0.861, "mdl_0f1e2d3c4b5a6978": 0.874},
               "difference": 0.013, "interval": [0.004, 0.022], "resamples": 1000,
               "better": "mdl_0f1e2d3c4b5a6978", "comparable": True, "reasons": [],
               "difference_is": f"mdl_0f1e2d3c4b5a6978 minus {MODEL['id']}"},
    "created_at": "2026-04-02T08:20:00Z", "started_at": "2026-04-02T08:20:01Z",
    "finished_at": "2026-04-02T08:20:03Z"}
CHANNEL_MOVE = {"model_id": MODEL["id"], "previous_model_id": "mdl_0f1e2d3c4b5a6978",
                "action": "set", "forced": False, "key_id": "key_5a5a5a5a5a5a5a5a",
                "job_id": None, "at": "2026-04-02T08:00:00Z"}
CHANNEL: dict[str, Any] = {
    "name": "kilns", "model_id": MODEL["id"], "created_at": "2026-03-14T10:00:00Z",
    "updated_at": "2026-04-02T08:00:00Z",
    "history": [CHANNEL_MOVE,
                {**CHANNEL_MOVE, "model_id": "mdl_0f1e2d3c4b5a6978",
                 "previous_model_id": None, "at": "2026-03-14T10:00:00Z"}]}
KEPT_ROW = {"firing_id": "F-000417", **ROW}
PREDICT_EXAMPLES = {
    "request": {JSON: {"rows": [KEPT_ROW], "keep": ["firing_id"]},
                CSV: ",".join(KEPT_ROW) + "\n" + ",".join(str(v) for v in KEPT_ROW.values())
                + "\n"},
    "responses": {"200": {JSON: {**PREDICTIONS, "kept": [{"firing_id": "F-000417"}]},
                          CSV: "firing_id,prediction,probability_0,probability_1\n"
                               "F-000417,0,0.83,0.17\n"}}}
JOB_CREATE = {"dataset_id": DATASET["id"], "target": "defect", "budget": {"trials": 40},
              "cv": {"folds": 5}, "seed": 0}

# (method, path) -> {"request": {media: example}, "responses": {status: {media: example}}}
EXAMPLES: dict[tuple[str, str], dict[str, Any]] = {
    ("get", "/healthz"): {"responses": {"200": {JSON: {"status": "ok"}}}},
    ("get", "/readyz"): {"responses": {"200": {JSON: {"status": "ready"}}}},
    ("get", "/metrics"): {"responses": {}},  # documented on the route itself
    ("post", "/v1/datasets"): {
        "request": {"multipart/form-data": {"name": "kilns", "file": "(kilns.csv)"},
                    "application/vnd.apache.parquet": "(Parquet bytes)"},
        "responses": {"201": {JSON: DATASET}}},
    ("get", "/v1/datasets"): {"responses": {"200": {
        JSON: {"items": [DATASET], "total": 1, "next": None},
        CSV: "id,name,rows,n_columns,size_bytes,source_format,sha256,created_at,warnings\n"
             f"{DATASET['id']},kilns,1200,13,98304,csv,9f2c…,2026-03-14T09:30:00+00:00,[]\n"}}},
    ("get", "/v1/datasets/{dataset_id}"): {"responses": {"200": {JSON: DATASET}}},
    ("delete", "/v1/datasets/{dataset_id}"): {"responses": {}},
    ("post", "/v1/jobs"): {"request": {JSON: JOB_CREATE},
                           "responses": {"202": {JSON: {**JOB, "status": "queued"}}}},
    ("get", "/v1/jobs"): {"responses": {"200": {
        JSON: {"items": [JOB_SUMMARY], "total": 3, "next": NEXT_JOBS},
        CSV: "id,dataset_id,status,target,task,metric,trials_completed,trials_pruned,"
             "trials_failed,trials_budget,best_score,elapsed_seconds,eta_seconds,model_id,"
             "created_at,finished_at,error\n"
             f"{JOB['id']},{DATASET['id']},running,defect,binary,roc_auc,17,4,0,40,0.8712,"
             "42.5,38.5,,2026-03-14T09:31:00+00:00,,\n"}}},
    ("get", "/v1/jobs/{job_id}"): {"responses": {"200": {JSON: JOB}}},
    ("post", "/v1/jobs/{job_id}/cancel"): {"responses": {"202": {
        JSON: {**JOB, "cancel_requested": True}}}},
    ("get", "/v1/jobs/{job_id}/trials"): {"responses": {"200": {
        JSON: {"items": [TRIAL], "total": 21, "next": NEXT_TRIALS},
        CSV: "number,state,score,score_std,boosting_rounds,duration_seconds,fold_scores,params\n"
             '11,complete,0.8712,0.0121,97,1.8,"[0.861,0.879,0.868,0.884,0.864]",'
             '"{""learning_rate"":0.052,""num_leaves"":31}"\n'}}},
    ("get", "/v1/jobs/{job_id}/leaderboard"): {"responses": {"200": {
        JSON: LEADERBOARD,
        CSV: "rank,number,score,score_std,boosting_rounds,learning_rate,num_leaves\n"
             "1,11,0.8712,0.0121,97,0.052,31\n"}}},
    ("get", "/v1/jobs/{job_id}/watch"): {"responses": {}},  # documented on the route
    ("get", "/v1/jobs/{job_id}/events"): {"responses": {}},  # 308 to /watch
    ("get", "/v1/jobs/{job_id}/plots/{name}.svg"): {"responses": {"200": {
        "image/svg+xml":
            '<svg xmlns="http://www.w3.org/2000/svg" viewBox="0 0 640 360">…</svg>'}}},
    ("get", "/v1/jobs/{job_id}/report"): {"responses": {"200": {
        "text/html": "<!doctype html><html><head><title>Job job_5c0f9a1e2b3d4e6f</title>…"}}},
    ("post", "/v1/jobs/{job_id}/report-links"): {
        "request": {JSON: {"expires_in": 3600}},
        "responses": {"200": {JSON: {
            "url": f"http://127.0.0.1:8000/v1/links/{JOB['id']}.1773484260."
                   f"q0V6x1yWcHn5c6bS2wKf3jRrP8mQe7tYz4uLg9aDh0E/jobs/{JOB['id']}/report",
            "expires_at": "2026-03-14T10:31:00Z"}}}},
    ("get", "/v1/models"): {"responses": {"200": {
        JSON: {"items": [MODEL_SUMMARY], "total": 1, "next": None},
        CSV: "id,job_id,dataset_id,task,metric,target,boosting_rounds,trial_number,holdout,"
             "sha256,created_at\n"
             f"{MODEL['id']},{JOB['id']},{DATASET['id']},binary,roc_auc,defect,97,11,"
             '"{""roc_auc"":0.8655}",c0ffee…,2026-03-14T09:33:00+00:00\n'}}},
    ("get", "/v1/models/{model_id}"): {"responses": {"200": {JSON: MODEL}}},
    ("delete", "/v1/models/{model_id}"): {"responses": {}},
    ("get", "/v1/audit"): {"responses": {"200": {JSON: {
        "items": [{"id": 41, "at": "2026-04-02T08:00:00Z", "key_id": "key_5a5a5a5a5a5a5a5a",
                   "action": "channel.set", "target": "kilns", "method": "PUT",
                   "path": "/v1/channels/kilns", "status": 200,
                   "detail": {"from": "mdl_1c1c1c1c1c1c1c1c", "to": MODEL["id"]}}],
        "total": 1, "next": None}}}},
    ("get", "/v1/models/{model_id}/drift"): {"responses": {"200": {JSON: {
        "model_id": MODEL["id"], "rows": 5000, "training_rows": 960,
        "days": [{"day": "2026-04-02", "rows": 5000}],
        "features": [{"name": "peak_temp_c", "kind": "numeric", "rows": 5000, "psi": 0.31,
                      "reading": "significant", "missing_rate": 0.0,
                      "training_missing_rate": 0.0,
                      "bins": {"training": [96, 96, 96, 96, 96, 96, 96, 96, 96, 96, 0],
                               "scored": [20, 31, 60, 140, 300, 510, 800, 1000, 1039, 1100,
                                          0],
                               "edges": [1182.0, 1197.5, 1209.0, 1218.1, 1226.0, 1234.2,
                                         1243.0, 1252.8, 1266.4]}}]}}}},
    ("get", "/v1/models/{model_id}/file"): {"responses": {"200": {
        "text/plain": "tree\nversion=v4\nnum_class=1\n…"}}},
    ("get", "/v1/models/{model_id}/bundle"): {"responses": {}},
    ("post", "/v1/models/{model_id}/predictions"): PREDICT_EXAMPLES,
    ("put", "/v1/channels/{name}"): {"request": {JSON: {"model_id": MODEL["id"]}},
                                     "responses": {"200": {JSON: CHANNEL}}},
    ("get", "/v1/channels/{name}"): {"responses": {"200": {JSON: CHANNEL}}},
    ("get", "/v1/channels"): {"responses": {"200": {JSON: {
        "items": [{k: CHANNEL[k] for k in ("name", "model_id", "updated_at")}],
        "total": 1, "next": None}}}},
    ("post", "/v1/channels/{name}/rollback"): {"responses": {"200": {JSON: {
        **CHANNEL, "model_id": "mdl_0f1e2d3c4b5a6978",
        "history": [{**CHANNEL_MOVE, "model_id": "mdl_0f1e2d3c4b5a6978",
                     "previous_model_id": MODEL["id"], "action": "rollback",
                     "at": "2026-04-02T08:05:00Z"},
                    *CHANNEL["history"]]}}}},
    ("post", "/v1/channels/{name}/predictions"): PREDICT_EXAMPLES,
    ("post", "/v1/models/{model_id}/scorings"): {
        "request": {JSON: {"dataset_id": DATASET["id"], "keep": ["firing_id"]}},
        "responses": {"202": {JSON: SCORING}}},
    ("post", "/v1/channels/{name}/scorings"): {
        "request": {JSON: {"dataset_id": DATASET["id"], "keep": ["firing_id"]}},
        "responses": {"202": {JSON: {**SCORING, "channel": "kilns"}}}},
    ("get", "/v1/scorings/{scoring_id}"): {"responses": {"200": {JSON: {
        **SCORING, "status": "running", "started_at": "2026-04-02T08:10:02Z",
        "progress": {"rows_done": 400000, "rows_total": 1000000, "fraction": 0.4}}}}},
    ("post", "/v1/scorings/{scoring_id}/cancel"): {"responses": {"202": {JSON: {
        **SCORING, "cancel_requested": True, "status": "cancelled"}}}},
    ("post", "/v1/comparisons"): {
        "request": {JSON: {"models": [MODEL["id"], "mdl_0f1e2d3c4b5a6978"],
                           "dataset_id": DATASET["id"]}},
        "responses": {"202": {JSON: {**COMPARISON, "status": "queued", "result": None,
                                     "finished_at": None}}}},
    ("get", "/v1/comparisons/{comparison_id}"): {"responses": {"200": {JSON: COMPARISON}}},
    ("get", "/v1/scorings/{scoring_id}/result"): {"responses": {"200": {
        "application/vnd.apache.parquet": "(Parquet bytes)",
        CSV: "firing_id,prediction,probability_0,probability_1\nF-000417,0,0.83,0.17\n"}}},
}


def _problem(status: int, title: str, code: str, detail: str, **extra: Any) -> dict[str, Any]:
    return {"type": TYPE_BASE + code, "title": title, "status": status, "detail": detail,
            "code": code, **extra}


NOT_FOUND = _problem(404, "Not found", "not_found", "no job with id 'job_nope'")
INVALID = _problem(422, "Invalid request", "validation_error", "invalid fields: limit",
                   errors=[{"field": "limit", "message": "Input should be greater than or "
                                                          "equal to 1"}])


def _set(content: dict[str, Any], media: str, example: Any) -> None:
    entry = content.setdefault(media, {})
    entry.pop("examples", None)
    entry["example"] = example


def add_examples(doc: dict[str, Any]) -> dict[str, Any]:
    for path, operations in doc.get("paths", {}).items():
        for method, op in operations.items():
            found = EXAMPLES.get((method, path), {})
            for media, example in found.get("request", {}).items():
                content = op.setdefault("requestBody", {}).setdefault("content", {})
                _set(content, media, example)
            for status, by_media in found.get("responses", {}).items():
                content = op["responses"].setdefault(status, {}).setdefault("content", {})
                for media, example in by_media.items():
                    _set(content, media, example)
            responses = op["responses"]
            # Errors are problem documents (schema from problems.document); give the two
            # commonest a realistic example, keeping the schema already there.
            for status, example in (("422", INVALID), ("404", NOT_FOUND)):
                if status in responses or (status == "404" and "{" in path):
                    entry = responses.setdefault(status, {"description": "No such resource"})
                    entry.setdefault("content", {}).setdefault(PROBLEM, {})["example"] = example
    return doc


def install(app: FastAPI) -> None:
    """Wrap ``app.openapi`` so the cached document carries the examples."""
    build = app.openapi

    def openapi() -> dict[str, Any]:
        if app.openapi_schema is None:
            app.openapi_schema = add_examples(build())
        return app.openapi_schema

    app.openapi = openapi  # type: ignore[method-assign]

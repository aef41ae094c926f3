"""The job report: one server-rendered HTML page, no scripts, no external requests.

Everything is inline (styles) or same-origin (the plot SVGs, as ``<img>``, so each plot is
an isolated document whose ids cannot clash). While a job is queued or running the page
reloads itself with ``<meta http-equiv="refresh">``.
"""

from __future__ import annotations

from html import escape
from typing import Any

REFRESH_SECONDS = 5
CAPTIONS = {
    "history": "Each dot is one trial's mean CV score; the line is the best score so far.",
    "hyperparameters": "How much of the variation in CV score each tuned parameter explains.",
    "features": "Where the winner's trees found their gain.",
    "learning": "Training vs validation score per round on the first CV fold, refit as the "
                "search fitted it; the dashed line is where early stopping settled on that "
                "fold (the final model's rounds average all folds).",
    "calibration": "Dots on the diagonal mean predicted probabilities can be taken at face "
                   "value.",
    "gains": "Working down the hold-out rows from the highest predicted probability: the "
             "share of all positives found so far. The dotted line is picking at random.",
    "confusion": "Hold-out rows by actual and predicted class, labelled as the service "
                 "labels predictions.",
    "predicted": "Each dot is a hold-out row; on the dotted line the prediction is exact.",
    "residuals": "Errors against predictions: a trend or a funnel means the model is off "
                 "in a systematic way for some range.",
    "segments": "The job's metric on each group of hold-out rows, with its bootstrap "
                "interval; red groups are worse than all rows by more than noise explains.",
}

CSS = """
:root{--ink:#1f2933;--muted:#616e7c;--line:#e4e7eb;--accent:#2f6f9f;--warn:#8a5a00;
--warnbg:#fff7e6;--bad:#b42318;--ok:#2e7d32;--stop:#5b4a86;--stopbg:#efecf6}
*{box-sizing:border-box}
body{margin:0;font:15px/1.5 system-ui,-apple-system,"Segoe UI",Roboto,sans-serif;color:var(--ink);
background:#f7f8fa}
main{max-width:1080px;margin:0 auto;padding:24px 20px 48px}
h1{font-size:22px;margin:0 0 4px}h2{font-size:17px;margin:28px 0 10px}
.sub{color:var(--muted);margin:0 0 16px}.sub code{font-size:13px}
.card{background:#fff;border:1px solid var(--line);border-radius:8px;padding:16px 18px;
margin-bottom:14px}
.status{display:inline-block;padding:1px 10px;border-radius:999px;font-size:13px;
font-weight:600;vertical-align:middle;margin-left:8px;background:#e8eef5;color:var(--accent)}
.status.succeeded{background:#e7f4e8;color:var(--ok)}
.status.failed{background:#fdecea;color:var(--bad)}
.status.cancelled{background:var(--stopbg);color:var(--stop)}
.facts{display:grid;grid-template-columns:repeat(auto-fit,minmax(170px,1fr));gap:10px 20px;
margin:0}
.facts dt{color:var(--muted);font-size:12px;text-transform:uppercase;letter-spacing:.04em}
.facts dd{margin:0;font-size:17px;font-variant-numeric:tabular-nums}
.bar{height:8px;background:var(--line);border-radius:4px;overflow:hidden;margin-top:12px}
.bar span{display:block;height:100%;background:var(--accent)}
.warnings{background:var(--warnbg);border-color:#f0d9a8;color:var(--warn)}
.warnings ul{margin:6px 0 0;padding-left:20px}.warnings li{margin:3px 0}
.error{background:#fdecea;border-color:#f5c2bd;color:var(--bad)}
.stopped{background:var(--stopbg);border-color:#d6cfe8;color:var(--stop)}
.settings dd{font-size:14px}
.links{display:flex;flex-wrap:wrap;gap:6px 18px;margin:0;padding:0;list-style:none}
.space td:first-child{font-family:ui-monospace,SFMono-Regular,Menlo,monospace;font-size:13px}
table{border-collapse:collapse;width:100%;font-variant-numeric:tabular-nums}
th,td{text-align:left;padding:6px 10px;border-bottom:1px solid var(--line);vertical-align:top}
th{font-size:12px;color:var(--muted);text-transform:uppercase;letter-spacing:.04em;
font-weight:600}
td.num,th.num{text-align:right}tr.win td{background:#f1f6fb}tr.worse td{color:var(--bad)}
.params{color:var(--muted);font-size:12.5px}
.plots{display:grid;grid-template-columns:repeat(auto-fit,minmax(460px,1fr));gap:14px}
figure{margin:0}figure img{width:100%;height:auto;display:block}
figcaption{color:var(--muted);font-size:13px;margin-top:6px}
.note{color:var(--muted);font-size:13px}
a{color:var(--accent)}
@media print{
@page{margin:14mm}
body{background:#fff;font-size:11pt}main{max-width:none;padding:0}
.card{border:none;border-radius:0;padding:0 0 8px;margin-bottom:10px}
#settings,.warnings,#state{break-inside:avoid}
.live,.bar,#links{display:none}
h2{break-after:avoid}.plots{display:block}
figure{break-inside:avoid;margin-bottom:12px}figure img{max-width:16cm}
table{font-size:9.5pt}tr{break-inside:avoid}tr.win td{background:none;font-weight:600}
.status{border:1px solid currentColor}
a{color:inherit;text-decoration:none}
}
"""


def _num(value: Any, digits: int = 4) -> str:
    if value is None:
        return "–"
    if isinstance(value, float):
        return f"{value:.{digits}g}" if abs(value) < 1e4 else f"{value:,.0f}"
    return escape(str(value))


def _facts(job: dict[str, Any]) -> str:
    p = job["progress"]
    # Every finished trial counts against the budget, failed ones too (as on the CLI).
    done = p["trials_completed"] + p["trials_pruned"] + p["trials_failed"]
    budget = p.get("trials_budget")
    items = [
        ("trials", f"{done}" + (f" of {budget}" if budget else "")),
        ("complete / pruned / failed",
         f"{p['trials_completed']} / {p['trials_pruned']} / {p['trials_failed']}"),
        (f"best CV {job['metric']}", _num(p.get("best_score"))),
        ("elapsed", f"{p['elapsed_seconds']:.0f} s"),
    ]
    dl = "".join(f"<div><dt>{escape(k)}</dt><dd>{escape(v)}</dd></div>" for k, v in items)
    share = min(1.0, done / budget) if budget else (1.0 if job["status"] == "succeeded" else 0)
    return (f'<section class="card"><dl class="facts">{dl}</dl>'
            f'<div class="bar" role="progressbar" aria-valuenow="{done}" '
            f'aria-valuemax="{budget or done}"><span style="width:{share:.0%}"></span></div>'
            "</section>")


def _warnings(messages: list[str]) -> str:
    if not messages:
        return ""
    items = "".join(f"<li>{escape(m)}</li>" for m in messages)
    return (f'<section class="card warnings" id="warnings"><strong>{len(messages)} '
            f"warning{'s' if len(messages) != 1 else ''}</strong><ul>{items}</ul></section>")


def _winner(model: dict[str, Any]) -> str:
    ev = (model.get("details") or {}).get("evaluation") or {}
    cv = model["cv"]
    intervals = ev.get("holdout_intervals") or {}
    rows = []
    for name, iv in intervals.items():
        mark = " ◀ optimised" if name == model["metric"] else ""
        rows.append(f"<tr><td>{escape(name)}{mark}</td><td class='num'>{_num(iv['estimate'])}"
                    f"</td><td class='num'>{_num(iv['low'])} – {_num(iv['high'])}</td>"
                    f"<td class='num'>{_num(iv['std_error'], 2)}</td></tr>")
    held = model.get("holdout_rows")
    table = (
        "<table><thead><tr><th>hold-out metric</th><th class='num'>score</th>"
        "<th class='num'>95% interval</th><th class='num'>std. error</th></tr></thead>"
        f"<tbody>{''.join(rows)}</tbody></table>"
        f"<p class='note'>{held} hold-out rows, never seen by the search; percentile "
        f"bootstrap with {ev.get('bootstrap_resamples', '?')} resamples (seed "
        f"{ev.get('seed', '?')}).</p>"
    ) if rows else "<p class='note'>No hold-out was set aside for this job.</p>"
    gap = ev.get("optimism")
    gap_text = ""
    if gap:
        verdict = ("more than chance explains" if gap["suspicious"]
                   else "within what fold spread and hold-out noise explain")
        gap_text = (f"<p>Optimism gap: hold-out is worse than CV by {_num(gap['worse_by'], 3)}"
                    f" (allowed {_num(gap['allowed'], 3)}): {verdict}.</p>")
    folds = ", ".join(_num(s) for s in cv.get("fold_scores") or [])
    leaves = ev.get("leaves") or {}
    cal = ev.get("calibration")
    extra = []
    if leaves.get("leaves"):
        extra.append(f"{leaves['leaves']} leaves, median {_num(leaves['median'])} rows, "
                     f"smallest {leaves['min']}")
    if cal:
        extra.append(f"Brier score {cal['brier']:.4f}")
    return (
        f'<section class="card" id="winner"><p>Model <code>{escape(model["id"])}</code>, '
        f"trial {model['trial_number']}, {_rounds(model)}. "
        f"CV {escape(model['metric'])}: <strong>{_num(cv.get('mean'))}</strong> ± "
        f"{_num(cv.get('std'), 2)} (folds: {folds}).</p>{_gain(model)}{gap_text}"
        f"{_calibration(model)}"
        f"{table}"
        + (f"<p class='note'>{escape('; '.join(extra))}.</p>" if extra else "")
        + "</section>"
    )


def _rounds(model: dict[str, Any]) -> str:
    """Boosting rounds; multiclass models grow one tree per class in each round."""
    rounds = model["boosting_rounds"]
    classes = len(model.get("classes") or ()) if model["task"] == "multiclass" else 0
    text = f"{rounds} boosting round{'s' if rounds != 1 else ''}"
    if classes > 2:
        text += f" ({rounds * classes} trees: one per class in each round)"
    return text


def _segments(ev: dict[str, Any]) -> str:
    seg = (ev.get("outcomes") or {}).get("segments")
    if not seg:
        return ""
    body = []
    for column in seg["columns"]:
        for s in column["segments"]:
            interval = (f"{_num(s['low'])} – {_num(s['high'])}" if s["low"] is not None
                        else "–")
            flag = "worse beyond noise" if s["worse"] else ""
            cls = ' class="worse"' if s["worse"] else ""
            body.append(f"<tr{cls}><td>{escape(column['column'])}</td><td>"
                        f"{escape(s['value'])}</td><td class='num'>{s['rows']}</td>"
                        f"<td class='num'>{_num(s['score'])}</td><td class='num'>{interval}"
                        f"</td><td>{flag}</td></tr>")
    whole = seg["whole"]
    return ("<h2>By segment</h2><section class='card' id='segments'><table><thead><tr>"
            "<th>column</th><th>segment</th><th class='num'>rows</th><th class='num'>"
            f"{escape(seg['metric'])}</th><th class='num'>{seg['level']:.0%} interval</th>"
            f"<th></th></tr></thead><tbody>{''.join(body)}</tbody></table><p class='note'>"
            f"All {whole['rows']} hold-out rows: {_num(whole['score'])}. Percentile bootstrap "
            f"with {seg['resamples']} resamples; a segment is flagged when the interval of "
            "its difference from all rows lies wholly on the worse side.</p></section>")
def _calibration(model: dict[str, Any]) -> str:
    """One paragraph: which map the served probabilities carry, and what it changed."""
    cal = (model.get("details") or {}).get("calibration")
    if not cal or "oof_log_loss" not in cal:
        reason = (cal or {}).get("reason")
        return (f"<p class='note' id='calibration'>Probabilities not calibrated: "
                f"{escape(reason)}.</p>" if reason and model["task"] != "regression" else "")
    oof, held = cal["oof_log_loss"], (cal.get("holdout") or {}).get("log_loss")
    ece, held_ece = cal["oof_ece"], (cal.get("holdout") or {}).get("ece")
    parts = [f"out-of-fold log loss {_num(oof['before'])} → {_num(oof['after'])}, "
             f"calibration error {_num(ece['before'], 3)} → {_num(ece['after'], 3)}"]
    if held and held_ece:  # the hold-out keeps both, or neither (tuner/model.py)
        parts.append(f"hold-out log loss {_num(held['before'])} → {_num(held['after'])}, "
                     f"calibration error {_num(held_ece['before'], 3)} → "
                     f"{_num(held_ece['after'], 3)}")
    if cal["applied"]:
        head = (f"Probabilities calibrated ({escape(cal['method'])} scaling, written into "
                "the model file)")
    else:
        head = f"Probabilities not calibrated ({escape(cal.get('reason') or '')})"
    return (f"<p id='calibration'>{head}: {escape('; '.join(parts))}. "
            "<span class='note'>Calibration error: mean gap between confidence and "
            "accuracy over 15 bins.</span></p>")


def _gain(model: dict[str, Any]) -> str:
    """One sentence: what tuning bought over LightGBM's defaults on the hold-out."""
    gain = (model.get("details") or {}).get("gain_over_defaults")
    if not gain:
        return ""
    if not gain.get("available"):
        return (f"<p class='note' id='gain'>No comparison with LightGBM's defaults: "
                f"{escape(gain.get('reason') or '')}.</p>")
    text = gain["verdict"]
    text = text[0].upper() + text[1:]
    cls = "" if gain["helped"] or gain["same_trial"] else " class='warnings'"
    return (f"<p id='gain'{cls}><strong>{escape(text)}.</strong> <span class='note'>The "
            f"served model vs LightGBM's defaults (trial {gain['baseline_trial']}, refit on "
            f"the same rows with its own {gain['baseline_rounds']} rounds, uncalibrated), "
            f"both scored on the same {gain['rows']} hold-out rows; paired percentile "
            f"bootstrap, {gain['resamples']} resamples.</span></p>")


def _param_order(space: dict[str, Any], rows: list[dict[str, Any]]) -> list[str]:
    """The search space's order, then any other name a trial carries (a warm start's)."""
    names = list(space)
    for r in rows:
        names += [k for k in r["params"] if k not in names]
    return names


def _leaderboard(rows: list[dict[str, Any]], count: int, winner: int | None,
                 space: dict[str, Any]) -> str:
    if not rows:
        return "<p class='note'>No trial has completed yet.</p>"
    order = _param_order(space, rows)
    body = []
    for r in rows:
        params = ", ".join(f"{k}={_num(r['params'][k], 3)}" for k in order
                           if k in r["params"])
        cls = ' class="win"' if r["number"] == winner else ""
        body.append(f"<tr{cls}><td class='num'>{r['rank']}</td><td class='num'>{r['number']}"
                    f"</td><td class='num'>{_num(r['score'])}</td><td class='num'>"
                    f"{_num(r['score_std'], 2)}</td><td class='num'>{_num(r['boosting_rounds'])}"
                    f"</td><td class='params'>{escape(params)}</td></tr>")
    more = (f"<p class='note'>Top {len(rows)} of {count} complete trials.</p>"
            if count > len(rows) else "")
    return ("<table id='leaderboard'><thead><tr><th class='num'>rank</th><th class='num'>"
            "trial</th><th class='num'>CV score</th><th class='num'>± std</th><th class='num'>"
            f"rounds</th><th>parameters</th></tr></thead><tbody>{''.join(body)}</tbody></table>"
            + more)


def _promotion(p: dict[str, Any] | None) -> str:
    """What the job's promote request did, with the champion/challenger comparison."""
    if not p:
        return ""
    moved = "moved to this job's model" if p.get("moved") else "not moved"
    head = (f"<p>Channel <code>{escape(str(p.get('channel', '')))}</code>, rule "
            f"<code>{escape(str(p.get('rule', '')))}</code>: <strong>{moved}</strong> · "
            f"{escape(str(p.get('reason') or p.get('error') or ''))}</p>")
    c = p.get("comparison") or {}
    table = ""
    if c.get("scores"):
        rows = "".join(f"<tr><td><code>{escape(m)}</code></td><td class='num'>{_num(v)}</td>"
                       "</tr>" for m, v in c["scores"].items())
        low, high = c["interval"]
        table = (f"<table><tr><th>model</th><th>{escape(c['metric'])} on "
                 f"{c['rows']} hold-out rows</th></tr>{rows}</table>"
                 f"<p class='note'>Difference (new minus current) {_num(c['difference'])}, "
                 f"95% paired bootstrap interval {_num(low)} – {_num(high)}.</p>")
    reasons = "".join(f"<li>{escape(r)}</li>" for r in c.get("reasons") or [])
    return (f'<h2>Promotion</h2><section class="card" id="promotion">{head}{table}'
            f"{'<ul>' + reasons + '</ul>' if reasons else ''}</section>")


def _plots(names: list[str]) -> str:
    if not names:
        return "<p class='note'>Plots appear once trials complete.</p>"
    figures = "".join(
        f'<figure class="card"><img src="plots/{n}.svg" alt="{n} plot" loading="lazy">'
        f"<figcaption>{escape(CAPTIONS[n])}</figcaption></figure>" for n in names)
    return f'<div class="plots">{figures}</div>'


def _range(spec: dict[str, Any]) -> str:
    """A search-space entry in words: a range, a list of choices, or a held value."""
    if "choices" in spec:
        return "one of " + ", ".join(_num(c, 3) for c in spec["choices"])
    if "value" in spec:
        return f"held at {_num(spec['value'], 4)}"
    scale = ", log scale" if spec.get("log") else ""
    kind = "integers " if spec.get("type") == "int" else ""
    return f"{kind}{_num(spec['low'], 3)} – {_num(spec['high'], 3)}{scale}"


def _validation(spec: dict[str, Any]) -> str:
    cv = spec.get("cv") or {}
    folds, parts = cv.get("folds"), cv.get("partition_folds")
    text = (f"{folds} of {parts} folds" if parts and parts != folds
            else f"{folds} folds") if folds else "–"
    text += f", {cv.get('strategy') or 'kfold'}"
    for key in ("group_column", "time_column"):
        if cv.get(key):
            text += f" by {cv[key]}"
    return text


def _settings(job: dict[str, Any], dataset: dict[str, Any] | None) -> str:
    """What the job was asked to do, as the worker ran it (the effective spec)."""
    spec = job.get("spec") or {}
    rows = spec.get("rows") or {}
    budget = spec.get("budget") or {}
    space = spec.get("search_space") or {}
    tuned = sum(1 for v in space.values() if "value" not in v)
    held = len(space) - tuned
    name = (dataset or {}).get("name")
    items = [
        ("dataset", f"{name} ({job['dataset_id']})" if name else job["dataset_id"]),
        ("rows", f"{rows.get('search', '–')} searched, {rows.get('holdout', '–')} held out"
         if rows else "–"),
        ("validation", _validation(spec)),
        ("hold-out", f"{spec.get('holdout_fraction', 0):.0%} of rows"),
        ("budget", " or ".join(part for part in (
            f"{budget['trials']} trials" if budget.get("trials") else "",
            f"{budget['seconds']:g} s" if budget.get("seconds") else "") if part) or "–"),
        ("search space", f"{tuned} parameters tuned" + (f", {held} held" if held else "")),
        ("seed", str(spec.get("seed", "–"))),
        ("objective", str(spec.get("objective") or "–")),
        ("pruner", str(spec.get("pruner") or "–")),
        ("selection", str(spec.get("selection") or "–")),
        ("rounds", f"at most {spec.get('max_rounds', '–')}, early stopping after "
                   f"{spec.get('early_stopping_rounds', '–')} without gain"),
        ("reproducible", "yes" if spec.get("reproducible") else "no"),
    ]
    if spec.get("weight_column"):
        items.insert(3, ("weights", spec["weight_column"]))
    dl = "".join(f"<div><dt>{escape(k)}</dt><dd>{escape(v)}</dd></div>" for k, v in items)
    return f'<section class="card" id="settings"><dl class="facts settings">{dl}</dl></section>'


def _space(job: dict[str, Any], model: dict[str, Any] | None,
           board: list[dict[str, Any]]) -> str:
    """Every parameter of the search space (the default one or the job's own), its range,
    and the winner's value."""
    space = (job.get("spec") or {}).get("search_space") or {}
    chosen = (model or {}).get("params") or (board[0]["params"] if board else {})
    head = "winner" if model else "best so far"
    names = _param_order(space, board)
    if not names:
        return ""
    body = "".join(
        f"<tr><td>{escape(n)}</td><td>{escape(_range(space[n])) if n in space else '–'}</td>"
        f"<td class='num'>{_num(chosen.get(n), 4)}</td></tr>" for n in names)
    return ("<h2>Search space</h2><section class='card'><table class='space' id='space'>"
            f"<thead><tr><th>parameter</th><th>searched</th><th class='num'>{head}</th></tr>"
            f"</thead><tbody>{body}</tbody></table></section>")


def _links(job: dict[str, Any], model: dict[str, Any] | None) -> str:
    """Relative links, so that under a signed link's prefix they stay inside it."""
    job_id = escape(job["id"])
    items = [(f"../{job_id}", "job (JSON)"), ("leaderboard?format=csv", "leaderboard (CSV)")]
    if model:
        base = f"../../models/{escape(model['id'])}"
        items += [(base, "model (JSON)"), (f"{base}/file", "model file (LightGBM text)"),
                  (f"{base}/bundle", "bundle (zip with predict.py)")]
    lis = "".join(f'<li><a href="{href}">{escape(text)}</a></li>' for href, text in items)
    return f'<nav class="card" id="links"><ul class="links">{lis}</ul></nav>'


def _state(job: dict[str, Any]) -> str:
    """Why a job ended without a model, drawn apart: a failure or a cancellation."""
    p = job["progress"]
    if job["status"] == "cancelled":
        done = p["trials_completed"] + p["trials_pruned"]
        return ('<section class="card stopped" id="state"><strong>Cancelled</strong> on '
                f"request after {done} trial{'s' if done != 1 else ''}. Cancelled jobs are "
                "not refit, so there is no model; the finished trials stay ranked below."
                "</section>")
    if job["status"] == "failed" or job.get("error"):
        return (f'<section class="card error" id="state"><strong>Failed:</strong> '
                f"{escape(job.get('error') or 'no reason recorded')}</section>")
    if job.get("cancel_requested"):
        return ('<section class="card stopped" id="state">Cancellation requested: the '
                "trials under way finish first.</section>")
    return ""


def render(job: dict[str, Any], board: list[dict[str, Any]], count: int,
           model: dict[str, Any] | None, plots: list[str], *,
           dataset: dict[str, Any] | None = None) -> str:
    """The whole page from plain dicts (``JobOut``, leaderboard rows, ``ModelOut``, and the
    dataset's ``id`` and ``name``)."""
    running = job["status"] in ("queued", "running")
    refresh = f'<meta http-equiv="refresh" content="{REFRESH_SECONDS}">' if running else ""
    ev = ((model or {}).get("details") or {}).get("evaluation") or {}
    warnings = list(job.get("warnings") or []) + list(ev.get("warnings") or [])
    if ev.get("error"):
        warnings.append(ev["error"])
    job_id = escape(job["id"])
    status = escape(job["status"])
    live = (f"<p class='note live'>This page reloads every {REFRESH_SECONDS} s while the job "
            "runs.</p>" if running else "")
    winner = _winner(model) if model else ""
    name = (dataset or {}).get("name")
    shown = (f"<strong>{escape(name)}</strong> (<code>{escape(job['dataset_id'])}</code>)"
             if name else f"<code>{escape(job['dataset_id'])}</code>")
    model_note = (f" · model <code>{escape(model['id'])}</code>" if model else "")
    space = (job.get("spec") or {}).get("search_space") or {}
    return f"""<!doctype html>
<html lang="en"><head><meta charset="utf-8">
<meta name="viewport" content="width=device-width,initial-scale=1">{refresh}
<title>{job_id} · {status} · Grovekeeper</title>
<style>{CSS}</style></head>
<body><main>
<h1>Tuning job <code>{job_id}</code><span class="status {status}">{status}</span></h1>
<p class="sub">Predicting <strong>{escape(job['target'])}</strong> ({escape(job['task'])})
from dataset {shown}, scored by <strong>{escape(job['metric'])}</strong>{model_note}</p>
{_links(job, model)}
{live}{_facts(job)}{_state(job)}{_warnings(warnings)}
{'<h2>Winner</h2>' + winner if winner else ''}
{_promotion(job.get('promotion'))}
<h2>Settings</h2>{_settings(job, dataset)}
{_space(job, model, board)}
<h2>Plots</h2>{_plots(plots)}{_segments(ev)}
<h2>Leaderboard</h2><section class="card">{_leaderboard(board, count,
    (model or {}).get('trial_number'), space)}</section>
</main></body></html>
"""

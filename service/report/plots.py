"""SVG plots of a job, drawn with matplotlib's object API from what the database holds.

Plots read our own rows (``gk_trials``, ``gk_models``), never Optuna objects, so drawing
one is a couple of indexed queries. Every data series carries an SVG ``id`` (``trials``,
``best``, ``bar-0``, ``train``, ``valid``, ``bins``, ``gains``, ``cell-i-j``, ``points``,
``segment-N``) so tests and scripts can find it.
"""

from __future__ import annotations

import io
from collections.abc import Callable, Sequence
from typing import Any

import matplotlib

matplotlib.use("Agg")  # headless; must precede any backend use

from matplotlib.backends.backend_svg import FigureCanvasSVG  # noqa: E402
from matplotlib.figure import Figure  # noqa: E402
from matplotlib.ticker import MaxNLocator  # noqa: E402

# Process-wide, set once: text stays text (small, crisp, selectable), curves keep every
# vertex (a learning curve with 300 rounds has 300 points), ids are stable across runs.
# Column names are data, not markup: with math text on, a name like "$\\foo$" fails to
# parse and the plot fails with it.
matplotlib.rcParams.update({"svg.fonttype": "none", "path.simplify": False,
                            "svg.hashsalt": "grovekeeper", "font.size": 10,
                            "text.parse_math": False})

INK, ACCENT, MUTED, WARM = "#1f2933", "#2f6f9f", "#9aa5b1", "#c8553d"
# The search history's own palette: teal trials, a plum best-so-far line, stone-grey
# pruned marks. They differ in lightness as well as hue, so they stay apart in print and
# for readers who confuse reds and greens.
HISTORY_TRIAL, HISTORY_BEST, HISTORY_PRUNED = "#0f766e", "#86198f", "#a8a29e"
NAMES = ("history", "hyperparameters", "features", "learning", "calibration", "gains",
         "confusion", "predicted", "residuals", "segments")
TOP_BARS = 15


class PlotUnavailable(Exception):
    """The job has no data for this plot (yet, or for its task)."""


def _figure(height: float = 3.4) -> tuple[Figure, Any]:
    fig = Figure(figsize=(6.4, height), layout="constrained")
    FigureCanvasSVG(fig)
    ax = fig.add_subplot()
    ax.spines[["top", "right"]].set_visible(False)
    ax.grid(True, color="#e4e7eb", linewidth=0.6)
    ax.set_axisbelow(True)
    return fig, ax


def _svg(fig: Figure) -> bytes:
    buf = io.BytesIO()
    fig.savefig(buf, format="svg", metadata={"Date": None})
    return buf.getvalue()


def history(trials: Sequence[dict[str, Any]], *, metric: str, direction: str) -> bytes:
    """Mean CV score per complete trial, pruned trials' partial means, and the best so far."""
    complete = [t for t in trials if t["state"] == "complete" and t["score"] is not None]
    if not complete:
        raise PlotUnavailable("no trial has completed yet")
    pick = max if direction == "maximize" else min
    fig, ax = _figure()
    # Scores on a row subsample (tuner/fidelity.py) are not comparable with these: such
    # trials are counted in the title, never drawn beside the full-rows scores.
    low = [t for t in trials if t["state"] == "pruned" and (t.get("fidelity") or 1.0) < 1.0]
    pruned = [t for t in trials if t["state"] == "pruned" and t["fold_scores"]
              and (t.get("fidelity") or 1.0) >= 1.0]
    if pruned:
        ax.scatter([t["number"] for t in pruned],
                   [sum(t["fold_scores"]) / len(t["fold_scores"]) for t in pruned],
                   marker="x", s=18, color=HISTORY_PRUNED, label="pruned (mean of folds run)",
                   gid="pruned")
    xs = [t["number"] for t in complete]
    ys = [t["score"] for t in complete]
    ax.scatter(xs, ys, s=22, color=HISTORY_TRIAL, label="complete trial", gid="trials",
               zorder=3)
    best, running = [], None
    for y in ys:
        running = y if running is None else pick(running, y)
        best.append(running)
    ax.step(xs, best, where="post", color=HISTORY_BEST, linewidth=1.6, label="best so far",
            gid="best")
    ax.xaxis.set_major_locator(MaxNLocator(integer=True))
    ax.set_xlabel("trial number")
    ax.set_ylabel(f"{metric} (mean over CV folds)")
    arrow = "higher is better" if direction == "maximize" else "lower is better"
    stopped = f", {len(low)} stopped on row subsamples" if low else ""
    ax.set_title(f"Search history: {len(complete)} complete, {len(pruned)} pruned{stopped} "
                 f"({arrow})", loc="left")
    ax.legend(frameon=False, fontsize=8)
    return _svg(fig)


def _bars(labels: list[str], values: list[float], *, xlabel: str, title: str,
          fmt: Callable[[float], str]) -> bytes:
    labels, values = labels[:TOP_BARS][::-1], values[:TOP_BARS][::-1]  # largest on top
    fig, ax = _figure(max(2.2, 0.62 + 0.26 * len(labels)))
    bars = ax.barh(labels, values, color=ACCENT, height=0.65)
    for i, patch in enumerate(reversed(bars.patches)):
        patch.set_gid(f"bar-{i}")
    for patch, value in zip(bars.patches, values, strict=True):
        ax.annotate(fmt(value), (patch.get_width(), patch.get_y() + patch.get_height() / 2),
                    xytext=(3, 0), textcoords="offset points", va="center", fontsize=8,
                    color=INK)
    ax.set_xlim(0, max(values) * 1.18 if max(values) > 0 else 1)
    ax.grid(False, axis="y")
    ax.set_xlabel(xlabel)
    ax.set_title(title, loc="left")
    return _svg(fig)


def hyperparameters(importance: dict[str, Any] | None) -> bytes:
    """fANOVA share of score variance per tuned parameter."""
    found = (importance or {}).get("importances") or {}
    if importance is None or not found:
        raise PlotUnavailable((importance or {}).get("note", "no hyperparameter importance"))
    names = list(found)
    return _bars(names, [100 * found[n] for n in names],
                 xlabel="share of CV-score variance explained (%, fANOVA)",
                 title=f"Which hyperparameters mattered ({importance['trials']} trials)",
                 fmt=lambda v: f"{v:.0f}%")


def features(importance: Sequence[dict[str, Any]]) -> bytes:
    """Total split gain per feature as a share of all gain, top features first."""
    total = sum(r["gain"] for r in importance)
    if not importance or total <= 0:
        raise PlotUnavailable("the model made no splits")
    rows = sorted(importance, key=lambda r: -r["gain"])
    more = f", top {TOP_BARS} of {len(rows)}" if len(rows) > TOP_BARS else ""
    return _bars([r["feature"] for r in rows], [100 * r["gain"] / total for r in rows],
                 xlabel="share of total split gain (%)",
                 title=f"Feature importance (gain{more})",
                 fmt=lambda v: f"{v:.1f}%")


def learning(curve: dict[str, Any] | None) -> bytes:
    """Training and validation metric per boosting round for the winner's first fold."""
    if not curve or not curve.get("valid"):
        raise PlotUnavailable("no learning curve recorded")
    fig, ax = _figure()
    rounds = list(range(1, len(curve["valid"]) + 1))
    ax.plot(rounds, curve["train"], color=MUTED, linewidth=1.4, label="training rows",
            gid="train")
    ax.plot(rounds, curve["valid"], color=ACCENT, linewidth=1.6, label="validation rows",
            gid="valid")
    best = curve["best_round"]
    ax.axvline(best, color=WARM, linewidth=1, linestyle="--",
               label=f"early stop on this fold: round {best}")
    ax.set_xlabel("boosting round")
    better = "higher is better" if curve.get("higher_is_better") else "lower is better"
    ax.set_ylabel(f"{curve['metric']} ({better})")
    ax.set_title(f"Learning curve of the winner, CV fold {curve['fold'] + 1}", loc="left")
    ax.legend(frameon=False, fontsize=8)
    return _svg(fig)


def calibration(cal: dict[str, Any] | None) -> bytes:
    """Reliability curve: observed frequency of class 1 per bin of predicted probability."""
    if not cal or not cal.get("counts"):
        raise PlotUnavailable("calibration is drawn for binary tasks with a hold-out")
    fig, ax = _figure(3.8)
    ax.plot([0, 1], [0, 1], color=MUTED, linewidth=1, linestyle=":", label="perfectly calibrated")
    ax.plot(cal["mean_predicted"], cal["observed"], color=ACCENT, linewidth=1.2,
            marker="o", markersize=4, label="hold-out rows", gid="bins")
    ax.set_xlim(0, 1)
    ax.set_ylim(0, 1)
    ax.set_xlabel("mean predicted probability of class 1 (per bin)")
    ax.set_ylabel("observed share of class 1")
    ax.set_title(f"Calibration on the hold-out (Brier score {cal['brier']:.4f})", loc="left")
    ax.legend(frameon=False, fontsize=8, loc="upper left")
    return _svg(fig)


def gains(data: dict[str, Any] | None) -> bytes:
    """Cumulative gains on the hold-out: share of positives caught by the top-scored rows."""
    if not data or not data.get("positives"):
        raise PlotUnavailable("the gains chart is drawn for binary tasks with a hold-out")
    fig, ax = _figure(3.8)
    ax.plot([0, 1], [0, 1], color=MUTED, linewidth=1, linestyle=":", label="rows at random")
    ax.plot([0, *data["share"]], [0, *data["captured"]], color=ACCENT, linewidth=1.4,
            marker="o", markersize=3, label="rows ranked by the model", gid="gains")
    ax.set_xlim(0, 1)
    ax.set_ylim(0, 1.02)
    ax.set_xlabel("share of hold-out rows, highest predicted probability first")
    ax.set_ylabel("share of all positives among them")
    top = data["lift"][min(1, len(data["lift"]) - 1)]
    ax.set_title(f"Cumulative gains ({data['positives']} positives in {data['rows']} rows; "
                 f"lift {top:.2f} at the top {data['share'][min(1, len(data['share']) - 1)]:.0%})",
                 loc="left")
    ax.legend(frameon=False, fontsize=8, loc="lower right")
    return _svg(fig)


def confusion(data: dict[str, Any] | None) -> bytes:
    """Counts of actual by predicted class on the hold-out, at the decision threshold."""
    if not data or not data.get("matrix"):
        raise PlotUnavailable("the confusion matrix is drawn for classification")
    matrix = data["matrix"]
    labels = [str(c) for c in data["classes"]]
    k = len(labels)
    fig = Figure(figsize=(4.8 + 0.3 * k, 3.6 + 0.3 * k), layout="constrained")
    FigureCanvasSVG(fig)
    ax = fig.add_subplot()
    ax.imshow(matrix, cmap="Blues", gid="cells")
    peak = max(max(row) for row in matrix) or 1
    for i, row in enumerate(matrix):
        for j, count in enumerate(row):
            ax.text(j, i, str(count), ha="center", va="center", gid=f"cell-{i}-{j}",
                    color="white" if count > peak / 2 else INK)
    ax.set_xticks(range(k), labels)
    ax.set_yticks(range(k), labels)
    ax.set_xlabel("predicted")
    ax.set_ylabel("actual")
    rule = (f" at threshold {data['threshold']:.3g}" if "threshold" in data
            else " (most probable class)")
    ax.set_title(f"Hold-out confusion matrix{rule}", loc="left")
    return _svg(fig)


def predicted(data: dict[str, Any] | None, *, residuals: bool = False) -> bytes:
    """Regression on the hold-out: predicted vs actual, or residuals vs predicted."""
    if not data or not data.get("actual"):
        raise PlotUnavailable("drawn for regression tasks with a hold-out")
    fig, ax = _figure(3.8)
    pred, actual = data["predicted"], data["actual"]
    if residuals:
        ys = [a - p for a, p in zip(actual, pred, strict=True)]
        ax.axhline(0, color=MUTED, linewidth=1, linestyle=":")
        ax.scatter(pred, ys, s=8, color=ACCENT, alpha=0.6, gid="points")
        ax.set_ylabel("residual (actual - predicted)")
        title = (f"Residuals vs predicted (mean {data['residual_mean']:.4g}, "
                 f"std {data['residual_std']:.4g})")
    else:
        low, high = min(min(pred), min(actual)), max(max(pred), max(actual))
        ax.plot([low, high], [low, high], color=MUTED, linewidth=1, linestyle=":",
                label="predicted = actual")
        ax.scatter(pred, actual, s=8, color=ACCENT, alpha=0.6, gid="points",
                   label="hold-out rows")
        ax.set_ylabel("actual")
        ax.legend(frameon=False, fontsize=8, loc="upper left")
        title = "Predicted vs actual"
    ax.set_xlabel("predicted")
    shown = f" ({data['shown']} of {data['rows']} rows)" if data["shown"] < data["rows"] else ""
    ax.set_title(title + shown, loc="left")
    return _svg(fig)


def segments(data: dict[str, Any] | None) -> bytes:
    """The metric per segment with its bootstrap interval; flagged segments in red."""
    if not data or not data.get("columns"):
        raise PlotUnavailable("the job names no segments, or has no hold-out")
    entries = [(c["column"], s) for c in data["columns"] for s in c["segments"]
               if s["score"] is not None]
    if not entries:
        raise PlotUnavailable("no segment has a defined score")
    fig, ax = _figure(1.2 + 0.28 * len(entries))
    ys = list(range(len(entries)))[::-1]
    for y, (_, s) in zip(ys, entries, strict=True):
        colour = WARM if s["worse"] else ACCENT
        if s["low"] is not None:
            ax.plot([s["low"], s["high"]], [y, y], color=colour, linewidth=1.4)
        ax.plot([s["score"]], [y], marker="o", color=colour, markersize=4,
                gid=f"segment-{len(entries) - 1 - y}")
    whole = data["whole"]["score"]
    if whole is not None:
        ax.axvline(whole, color=MUTED, linewidth=1, linestyle=":", gid="whole")
    ax.set_yticks(ys, [f"{c} = {s['value']} ({s['rows']})" for c, s in entries], fontsize=8)
    arrow = "higher is better" if data["direction"] == "maximize" else "lower is better"
    ax.set_xlabel(f"{data['metric']} on the hold-out ({arrow}); dotted: all rows")
    ax.set_title(f"Per segment, {data['level']:.0%} bootstrap intervals; red: worse than "
                 "all rows beyond noise", loc="left", fontsize=9)
    return _svg(fig)


def render(name: str, *, trials: Sequence[dict[str, Any]], job: dict[str, Any],
           model: dict[str, Any] | None) -> bytes:
    """Draw plot ``name`` (one of :data:`NAMES`) from plain dicts of our rows.

    Raises:
        KeyError: Unknown plot name.
        PlotUnavailable: The job has nothing to draw for it (yet).
    """
    if name == "history":
        return history(trials, metric=job["metric"], direction=job["direction"])
    if name not in NAMES:
        raise KeyError(name)
    if model is None:
        raise PlotUnavailable("this plot is drawn once the job has a model")
    evaluation = (model.get("details") or {}).get("evaluation") or {}
    if name == "hyperparameters":
        return hyperparameters(evaluation.get("hyperparameter_importance"))
    if name == "features":
        return features(model["feature_importance"])
    if name == "learning":
        return learning(evaluation.get("learning_curve"))
    outcomes = evaluation.get("outcomes") or {}
    if name == "gains":
        return gains(outcomes.get("gains"))
    if name == "confusion":
        return confusion(outcomes.get("confusion"))
    if name in ("predicted", "residuals"):
        return predicted(outcomes.get("regression"), residuals=name == "residuals")
    if name == "segments":
        return segments(outcomes.get("segments"))
    return calibration(evaluation.get("calibration"))


def available(*, trials: Sequence[dict[str, Any]], model: dict[str, Any] | None) -> list[str]:
    """Names of the plots :func:`render` can draw from this data, without drawing them."""
    names = []
    if any(t["state"] == "complete" and t["score"] is not None for t in trials):
        names.append("history")
    if model is None:
        return names
    evaluation = (model.get("details") or {}).get("evaluation") or {}
    if ((evaluation.get("hyperparameter_importance") or {}).get("importances")):
        names.append("hyperparameters")
    if sum(r["gain"] for r in model["feature_importance"]) > 0:
        names.append("features")
    if (evaluation.get("learning_curve") or {}).get("valid"):
        names.append("learning")
    if (evaluation.get("calibration") or {}).get("counts"):
        names.append("calibration")
    outcomes = evaluation.get("outcomes") or {}
    if (outcomes.get("gains") or {}).get("positives"):
        names.append("gains")
    if outcomes.get("confusion"):
        names.append("confusion")
    if (outcomes.get("regression") or {}).get("actual"):
        names += ["predicted", "residuals"]
    if any(s["score"] is not None for c in (outcomes.get("segments") or {}).get("columns", [])
           for s in c["segments"]):
        names.append("segments")
    return names

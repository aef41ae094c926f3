"""The live progress line of ``grovekeeper tune --wait`` and ``grovekeeper watch``.

On a terminal one line is redrawn in place; otherwise (a log file, CI) a plain line is
printed only when something changed, so logs stay readable.
"""

from __future__ import annotations

from typing import Any, TextIO

BAR_WIDTH = 24


def clock(seconds: float | None) -> str:
    if seconds is None:
        return "?"
    seconds = int(round(seconds))
    hours, rest = divmod(seconds, 3600)
    minutes, secs = divmod(rest, 60)
    return f"{hours}:{minutes:02d}:{secs:02d}" if hours else f"{minutes}:{secs:02d}"


def describe(job: dict[str, Any], *, bar: bool) -> str:
    """One line: bar, trials done of the budget, pruned, best score, elapsed, time left."""
    p = job["progress"]
    done = p["trials_completed"] + p["trials_pruned"] + p["trials_failed"]
    budget = p.get("trials_budget")
    parts = []
    if bar and budget:
        filled = min(BAR_WIDTH, round(BAR_WIDTH * done / budget))
        parts.append("[" + "#" * filled + "-" * (BAR_WIDTH - filled) + "]")
    parts.append(f"{done}/{budget} trials" if budget else f"{done} trials")
    parts.append(f"{p['trials_pruned']} pruned")
    if p["trials_failed"]:
        parts.append(f"{p['trials_failed']} failed")
    best = p.get("best_score")
    parts.append(f"best {job.get('metric', 'score')} {best:.4f}" if best is not None
                 else "best -")
    parts.append(f"{clock(p['elapsed_seconds'])} elapsed")
    if job["status"] == "running":
        eta = p.get("eta_seconds")
        parts.append(f"~{clock(eta)} left" if eta is not None else "time left ?")
    else:
        parts.append(job["status"])
    return "  ".join(parts)


class ProgressView:
    def __init__(self, stream: TextIO, *, tty: bool | None = None) -> None:
        self.stream = stream
        self.tty = stream.isatty() if tty is None else tty
        self._last: str | None = None
        self._drawn = False

    def update(self, job: dict[str, Any]) -> None:
        line = describe(job, bar=self.tty)
        if self.tty:
            # \r and erase-line redraw in place; elapsed time ticks even without news.
            self.stream.write("\r\x1b[2K" + line)
            self._drawn = True
        else:
            p = job["progress"]
            key = f"{job['status']} {p['trials_completed']} {p['trials_pruned']} " \
                  f"{p['trials_failed']}"
            if key == self._last:
                return
            self._last = key
            self.stream.write(line + "\n")
        self.stream.flush()

    def close(self) -> None:
        if self.tty and self._drawn:
            self.stream.write("\n")
            self.stream.flush()

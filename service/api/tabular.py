"""CSV answers for list endpoints (``Accept: text/csv`` or ``?format=csv``).

Every text cell the service writes into a CSV answer (names of datasets and columns,
class labels, targets) is neutralised against spreadsheet formula injection, following
OWASP's CSV injection guidance: text starting with ``=``, ``+``, ``-``, ``@``, a tab or a
carriage return gets a leading apostrophe, so a spreadsheet shows it as text instead of
running it. Numbers are never touched, nor is text that is a plain number (``-3.5``).
Columns a caller asked to have echoed (``exact``: kept id columns) stay byte for byte as
sent: they are the caller's own values, and altering them would break joins.
"""

from __future__ import annotations

import csv
import io
import json
import re
from collections.abc import Collection, Iterable, Sequence
from datetime import datetime
from typing import TYPE_CHECKING, Any, cast

from fastapi import Request
from fastapi.responses import Response

if TYPE_CHECKING:
    import pandas as pd

CSV = "text/csv; charset=utf-8"


def wants_csv(request: Request, fmt: str | None) -> bool:
    if fmt is not None:
        return fmt.lower() == "csv"
    accept = request.headers.get("accept", "")
    return "text/csv" in accept and "application/json" not in accept


_FORMULA_START = ("=", "+", "-", "@", "\t", "\r")
_NUMBER = re.compile(r"^[+-]?(\d+\.?\d*|\.\d+)([eE][+-]?\d+)?$")


def neutralise(value: Any) -> Any:
    """``value`` made safe to open in a spreadsheet (see the module notes)."""
    if isinstance(value, str) and value.startswith(_FORMULA_START) and not _NUMBER.match(value):
        return "'" + value
    return value


def _cell(value: Any) -> Any:
    if isinstance(value, datetime):
        return value.isoformat()
    if isinstance(value, dict | list):
        return json.dumps(value, separators=(",", ":"))
    return "" if value is None else neutralise(value)


def csv_response(header: Sequence[str], rows: Iterable[Sequence[Any]]) -> Response:
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    writer.writerow([neutralise(h) for h in header])
    for row in rows:
        writer.writerow([_cell(v) for v in row])
    return Response(buffer.getvalue(), media_type=CSV)


def neutralised_frame(frame: pd.DataFrame, exact: Collection[str] = ()) -> pd.DataFrame:
    """``frame`` with formula-like headers and text cells neutralised, except the
    ``exact`` columns (name and values as the caller sent them)."""
    import numpy as np  # loaded with the first frame, not with the API
    import pandas as pd

    out = frame.rename(columns=lambda c: c if c in exact else neutralise(str(c)))
    for i, name in enumerate(frame.columns):
        column = frame.iloc[:, i]
        if name in exact or not (pd.api.types.is_object_dtype(column.dtype)
                                 or isinstance(column.dtype, pd.StringDtype)):
            continue
        codes, uniques = pd.factorize(column, use_na_sentinel=True)  # labels: few distinct
        fixed = [neutralise(u) for u in uniques]
        if any(f is not u for f, u in zip(fixed, uniques, strict=True)):
            values = np.asarray([*fixed, None], dtype=object)[codes]
            # pandas takes a Series here; pandas-stubs leave it out of the value types.
            out.isetitem(i, pd.Series(values, index=frame.index,  # type: ignore[arg-type]
                                      dtype=object))
    return out


_SPECIAL = (",", '"', "\n", "\r")


def frame_csv(frame: pd.DataFrame, exact: Collection[str] = ()) -> str:
    """``frame.to_csv(index=False)``, faster for the columns a prediction answer holds.

    pandas formats floats through NumPy's per-value string conversion, which costs more
    than the predictions themselves on a large batch. Python's ``repr`` gives the same
    shortest round-trip digits (checked to be identical, missing values empty as in
    pandas), and text that needs no quoting is copied as it is. Any other column, or text
    that would need quotes, goes to pandas. Text is neutralised first (module notes),
    except in the ``exact`` columns.
    """
    frame = neutralised_frame(frame, exact)
    header = [str(c) for c in frame.columns]
    cells = [_cells(frame[c]) for c in frame.columns]
    columns = [c for c in cells if c is not None]
    if len(columns) < len(cells) or not _plain(header) or (
            len(columns) == 1 and "" in columns[0]):  # pandas quotes a lone empty cell
        return frame.to_csv(index=False)
    lines = map(",".join, zip(*columns, strict=True))
    return ",".join(header) + "\n" + "".join(line + "\n" for line in lines)


def _cells(s: pd.Series) -> list[str] | None:
    import numpy as np  # loaded with the first frame, not with the API
    import pandas as pd

    dtype = s.dtype
    if dtype == np.float64:
        values = s.to_numpy()
        cells = list(map(repr, values.tolist()))
        for i in np.flatnonzero(np.isnan(values)):
            cells[i] = ""
        return cells
    if dtype in (np.int64, np.int32, np.bool_):
        return list(map(str, s.to_numpy().tolist()))
    if pd.api.types.is_object_dtype(dtype) or isinstance(dtype, pd.StringDtype):
        codes, uniques = pd.factorize(s, use_na_sentinel=True)  # labels: a few distinct
        texts = [str(u) for u in uniques]
        if not _plain(texts):
            return None
        # tolist() is untyped; an object array of these texts gives back str.
        return cast(list[str], np.asarray([*texts, ""], dtype=object)[codes].tolist())
    return None


def _plain(texts: list[str]) -> bool:
    """No value needs quoting (nor starts with a space pandas would keep as is)."""
    return not any(ch in t for t in texts for ch in _SPECIAL)

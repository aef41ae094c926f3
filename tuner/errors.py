"""Exception tree of the tuner package.

Every error the tuner raises on purpose derives from :class:`TunerError`, so a caller can
turn all of them into one kind of failure. Errors caused by bad input also derive from
``ValueError`` so that generic handlers written for builtin exceptions still catch them.
Input errors carry a machine-readable ``errors`` list of ``{"field", "message"}`` dicts;
``field`` names the column, parameter or row at fault (for example ``"rows[3].clay_body"``).
"""

from __future__ import annotations

from typing import Any

#: Longest ``errors`` list an exception keeps; a broken file can produce millions.
MAX_ERRORS = 50


class TunerError(Exception):
    """Base class of every error raised on purpose by the tuner."""


class _FieldErrors(TunerError):
    """A tuner error that lists the fields at fault."""

    def __init__(self, message: str, errors: list[dict[str, Any]] | None = None) -> None:
        """Create the error.

        Args:
            message: A readable summary of the problem.
            errors: ``{"field": ..., "message": ...}`` entries; at most ``MAX_ERRORS`` are kept.
        """
        self.message = message
        self.errors: list[dict[str, Any]] = [
            {"field": str(e["field"]), "message": str(e["message"])}
            for e in (errors or [])[:MAX_ERRORS]
        ]
        # Both in args, so the error survives pickling (e.g. across a process pool).
        super().__init__(message, self.errors)

    def __str__(self) -> str:
        return self.message


class DatasetError(_FieldErrors, ValueError):
    """The uploaded table, or the columns chosen from it, cannot be used."""


class SearchSpaceError(_FieldErrors, ValueError):
    """A search-space override names an unknown parameter or an invalid range."""


class ConfigError(_FieldErrors, ValueError):
    """A search setting (metric, task, validation strategy) is invalid."""


class PredictionInputError(_FieldErrors, ValueError):
    """Rows sent for prediction do not match the model's feature schema."""


class ArtifactError(TunerError):
    """A saved model is missing, corrupt or does not match its checksum."""


def summarise(prefix: str, errors: list[dict[str, Any]]) -> str:
    """Build a one-line message from the first few field errors.

    Args:
        prefix: What went wrong in general, e.g. ``"invalid prediction input"``.
        errors: The collected ``{"field", "message"}`` entries.

    Returns:
        ``"<prefix>: <field>: <message>; ..."`` with at most three entries spelled out.
    """
    shown = "; ".join(f"{e['field']}: {e['message']}" for e in errors[:3])
    more = f" (and {len(errors) - 3} more)" if len(errors) > 3 else ""
    return f"{prefix}: {shown}{more}" if shown else prefix

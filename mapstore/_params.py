"""Parameter checks shared by the public entry points, with one wording for every message."""

from __future__ import annotations

import os

from .errors import ParameterError

__all__ = ["resolve_jobs", "positive_int"]


def positive_int(name: str, value: object) -> int:
    if isinstance(value, bool) or not isinstance(value, int) or value < 1:
        raise ParameterError(f"{name} must be a positive integer, got {value!r}")
    return value


def resolve_jobs(jobs: int | None) -> int:
    """Worker processes: ``None`` means one per core."""
    if jobs is None:
        return os.cpu_count() or 1
    return positive_int("jobs", jobs)

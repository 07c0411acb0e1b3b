"""Parameters declared once, as data: their kind, range and choices.

Each public entry point names its declared parameters with :func:`declared`; a value outside its
declaration raises :class:`~mapstore.errors.ParameterError` in one form everywhere: the caller, the
parameter, what it must be, and what it got.  The CLI builds its option types from the same
declarations (:meth:`Param.click_type`), so a choice added here reaches both.  This module imports no
numeric library: ``mapstore --help`` reads it.
"""

from __future__ import annotations

import functools
import inspect
import numbers
import os
from dataclasses import dataclass
from typing import Any, Callable

from .errors import ParameterError
from .statkinds import LEVEL_CHOICES, POOL_METHODS

__all__ = ["Param", "declared", "resolve_jobs", "positive_int", "RESAMPLE_METHODS", "FEATURE_STATS", "P_SIDED",
           "BACKGROUNDS", "MISSING_POLICIES", "PER_SUBJECT", "EXPORT_FORMATS", "JOBS", "BATCH_SIZE",
           "RESAMPLE_METHOD", "FEATURE_STAT", "P_SIDE", "BACKGROUND", "MISSING", "PER_SUBJECT_RULE",
           "MIN_VOXELS", "MIN_COVERAGE", "EXPORT_FORMAT", "POOL_METHOD", "MIN_SUBJECTS", "MIN_STUDIES", "FDR_Q",
           "NEAR_COPY", "TOP_K", "SEED", "LEVEL", "MAP_MB_LIMIT", "READ_TIMEOUT", "CHECK_COVERAGE", "AGREEMENT", "DEMO_SCALE"]

RESAMPLE_METHODS = ("linear", "nearest", "cubic")
FEATURE_STATS = ("native", "z")
P_SIDED = ("one", "two")
BACKGROUNDS = ("auto", "keep")
MISSING_POLICIES = ("common", "zero", "keep")  # what X does with voxels some selected map has no value for
PER_SUBJECT = ("contrast", "one", "map")
EXPORT_FORMATS = ("npy", "parquet", "zarr")


@dataclass(frozen=True)
class Param:
    """One parameter's declaration: the types it takes, its choices or its range, whether None is allowed."""

    kind: type | tuple[type, ...]
    choices: tuple[Any, ...] | None = None
    low: float | None = None
    high: float | None = None
    low_open: bool = False
    high_open: bool = False
    none_ok: bool = False

    def describe(self) -> str:
        """What a value must be, in words."""
        if self.choices is not None:
            return f"one of {list(self.choices)}"
        kind = "an integer" if self.kind is int else "a number" if self.kind in (float, (int, float)) else \
            f"a {getattr(self.kind, '__name__', self.kind)}"
        if self.low is not None and self.high is not None:
            return (f"{kind} in {'(' if self.low_open else '['}{self.low:g}, {self.high:g}"
                    f"{')' if self.high_open else ']'}")
        if self.low is not None:
            return f"{kind} {'>' if self.low_open else '>='} {self.low:g}"
        return kind

    def valid(self, value: Any) -> bool:
        if value is None:
            return self.none_ok
        if self.choices is not None:
            return isinstance(value, str) and value in self.choices
        if isinstance(value, bool) or not isinstance(value, numbers.Real):
            return False
        if self.kind is int and not isinstance(value, numbers.Integral):
            return False
        v = float(value)
        if v != v:  # NaN
            return False
        if self.low is not None and (v < self.low or (self.low_open and v == self.low)):
            return False
        return not (self.high is not None and (v > self.high or (self.high_open and v == self.high)))

    def check(self, name: str, value: Any, caller: str) -> Any:
        """``value`` if it fits the declaration; else ParameterError in the one form."""
        if not self.valid(value):
            raise ParameterError(f"{caller}: {name} must be {self.describe()}"
                                 f"{' or None' if self.none_ok else ''}, got {value!r}")
        return value

    def click_type(self):
        """The click type of the CLI option that sets this parameter."""
        import click

        if self.choices is not None:
            return click.Choice(self.choices)
        rng = click.IntRange if self.kind is int else click.FloatRange
        return rng(min=self.low, max=self.high, min_open=self.low_open, max_open=self.high_open)


JOBS = Param(int, low=1, none_ok=True)
BATCH_SIZE = Param(int, low=1, none_ok=True)
RESAMPLE_METHOD = Param(str, RESAMPLE_METHODS)
FEATURE_STAT = Param(str, FEATURE_STATS)
P_SIDE = Param(str, P_SIDED)
BACKGROUND = Param(str, BACKGROUNDS)
MISSING = Param(str, MISSING_POLICIES)
PER_SUBJECT_RULE = Param(str, PER_SUBJECT)
MIN_VOXELS = Param(int, low=1, none_ok=True)
MIN_COVERAGE = Param((int, float), low=0, high=1, none_ok=True)
EXPORT_FORMAT = Param(str, EXPORT_FORMATS)
POOL_METHOD = Param(str, POOL_METHODS)
MIN_SUBJECTS = Param(int, low=2)
MIN_STUDIES = Param(int, low=1)
FDR_Q = Param((int, float), low=0, high=1, low_open=True, high_open=True)
NEAR_COPY = Param((int, float), low=0, high=1, low_open=True, none_ok=True)
TOP_K = Param(int, low=1)
MAP_MB_LIMIT = Param(int, low=1)
READ_TIMEOUT = Param((int, float), low=0, low_open=True, none_ok=True)
CHECK_COVERAGE = Param((int, float), low=0, high=1)
AGREEMENT = Param((int, float), low=-1, high=1)
DEMO_SCALE = Param((int, float), low=0.1, high=1)
SEED = Param(int)
LEVEL = Param(str, LEVEL_CHOICES)


def declared(**params: Param) -> Callable[[Callable], Callable]:
    """Check the named arguments of the decorated entry point against their declarations on every call
    (the caller's name in the message is the function's)."""
    def wrap(func: Callable) -> Callable:
        sig = inspect.signature(func)
        unknown = set(params) - set(sig.parameters)
        if unknown:  # a declaration that names no parameter is a mistake in mapstore, found at import
            raise TypeError(f"{func.__qualname__} has no parameter(s) {sorted(unknown)}")
        caller = func.__qualname__.replace(".<locals>", "")

        @functools.wraps(func)
        def run(*args: Any, **kwargs: Any) -> Any:
            bound = sig.bind_partial(*args, **kwargs)
            for name, value in bound.arguments.items():
                if name in params:
                    params[name].check(name, value, caller)
            return func(*args, **kwargs)

        run.__declared__ = params  # type: ignore[attr-defined]
        return run

    return wrap


def positive_int(name: str, value: object) -> int:
    return Param(int, low=1).check(name, value, "mapstore")


def resolve_jobs(jobs: int | None) -> int:
    """Worker processes: ``None`` means one per core."""
    JOBS.check("jobs", jobs, "mapstore")
    return os.cpu_count() or 1 if jobs is None else jobs

"""Parameters are declared once: every entry point refuses a value outside its declaration with
ParameterError in one form, the same mistake raises the same class everywhere, and the CLI's option
types come from the same declarations."""

from __future__ import annotations

import click
import numpy as np
import pytest

import mapstore
from mapstore import _params
from mapstore.analyses import combine, pool, write_pooled
from mapstore.check import check_store
from mapstore.cli import cli
from mapstore.errors import ParameterError
from mapstore.features import build_features
from mapstore.select import export_selection, select
from mapstore.targets import resample

ENTRY_POINTS = [
    (build_features, {"method": "bilinear"}, "method"),
    (build_features, {"stat": "t"}, "stat"),
    (build_features, {"p_sided": "both"}, "p_sided"),
    (build_features, {"jobs": 0}, "jobs"),
    (build_features, {"batch_size": 1.5}, "batch_size"),
    (mapstore.index, {"max_map_mb": -1}, "max_map_mb"),
    (mapstore.index, {"read_timeout": 0}, "read_timeout"),
    (select, {"missing": "drop"}, "missing"),
    (select, {"min_voxels": 0}, "min_voxels"),
    (select, {"min_coverage": 1.5}, "min_coverage"),
    (select, {"per_subject": "all"}, "per_subject"),
    (export_selection, {"fmt": "csv"}, "fmt"),
    (export_selection, {"seed": "1"}, "seed"),
    (export_selection, {"near_copy_r": 0.0}, "near_copy_r"),
    (pool, {"method": "average"}, "method"),
    (pool, {"min_subjects": 1}, "min_subjects"),
    (pool, {"min_studies": True}, "min_studies"),
    (combine, {"method": "average"}, "method"),
    (write_pooled, {"fdr_q": 1.0}, "fdr_q"),
    (check_store, {"min_agreement": 2}, "min_agreement"),
]


@pytest.mark.parametrize("func, bad, name", ENTRY_POINTS,
                         ids=[f"{f.__name__}-{n}" for f, _, n in ENTRY_POINTS])
def test_a_value_outside_its_declaration_is_refused_in_one_form(func, bad, name):
    # the positional arguments are never reached: the declaration is checked first
    with pytest.raises(ParameterError) as err:
        func(*[None] * _positional(func), **bad)
    msg = str(err.value)
    assert msg.startswith(f"{func.__name__}: {name} must be ") and f"got {bad[name]!r}" in msg and "\n" not in msg


def _positional(func) -> int:
    import inspect

    return sum(p.default is inspect.Parameter.empty and p.kind == p.POSITIONAL_OR_KEYWORD
               for p in inspect.signature(func).parameters.values())


def test_the_same_mistake_raises_the_same_class_everywhere():
    from mapstore.targets import builtin_grid

    grid = builtin_grid("MNI152-3mm")
    with pytest.raises(ParameterError, match="resample: method must be one of"):
        resample(np.zeros((4, 4, 4), np.float32), np.eye(4), grid, "bilinear")
    with pytest.raises(ParameterError, match="build_features: method must be one of"):
        build_features("nowhere", method="bilinear")


def _option(command: str, name: str) -> click.Option:
    return next(p for p in cli.commands[command].params if p.name == name)


@pytest.mark.parametrize("command, option, param", [
    ("features", "method", _params.RESAMPLE_METHOD), ("features", "stat", _params.FEATURE_STAT),
    ("features", "p_sided", _params.P_SIDE), ("features", "background", _params.BACKGROUND),
    ("export", "missing", _params.MISSING), ("export", "per_subject", _params.PER_SUBJECT_RULE),
    ("export", "fmt", _params.EXPORT_FORMAT), ("pool", "method", _params.POOL_METHOD),
    ("export", "level", _params.LEVEL),
])
def test_the_clis_choices_are_the_declarations(command, option, param):
    assert tuple(_option(command, option).type.choices) == tuple(param.choices)


@pytest.mark.parametrize("command, option, param", [
    ("pool", "min_subjects", _params.MIN_SUBJECTS), ("pool", "fdr_q", _params.FDR_Q),
    ("export", "near_copy_r", _params.NEAR_COPY), ("index", "jobs", _params.JOBS),
    ("check", "min_agreement", _params.AGREEMENT),
])
def test_the_clis_ranges_are_the_declarations(command, option, param):
    t = _option(command, option).type
    assert (t.min, t.max, t.min_open, t.max_open) == (param.low, param.high, param.low_open, param.high_open)


def test_every_declaration_names_a_real_parameter():
    with pytest.raises(TypeError, match="no parameter"):
        _params.declared(nope=_params.SEED)(lambda x: x)

"""t-to-z and p-to-z against printed tables and scipy.stats."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from mapstore.errors import ConversionError
from mapstore.targets._convert import convert, p_to_z, t_to_z


@pytest.mark.parametrize("t, df, z", [
    # printed Student t table (two-sided p = 0.05 -> t critical), standard normal table: 1.960
    (2.228, 10, 1.960),
    (2.086, 20, 1.960),
    (2.042, 30, 1.960),
    # two-sided p = 0.01 -> z = 2.576
    (3.169, 10, 2.576),
    (2.845, 20, 2.576),
])
def test_t_table(t, df, z):
    assert t_to_z(t, df) == pytest.approx(z, abs=2e-3)
    assert t_to_z(-t, df) == pytest.approx(-z, abs=2e-3)


def test_against_scipy_in_the_body_and_tails():
    # reference: scipy.stats t and norm where they do not underflow
    t = np.array([0.0, 0.5, 1.0, 3.0, 8.0, 20.0, 40.0])
    for df in (5, 20, 200):
        ref = stats.norm.isf(stats.t.sf(t, df))
        np.testing.assert_allclose(t_to_z(t, df), ref, rtol=1e-9, atol=1e-12)


def test_extreme_tails_stay_finite_and_monotone():
    # t = 40 at df = 20 gives a finite z (scipy: about 9.30)
    assert np.isfinite(t_to_z(40.0, 20)) and t_to_z(40.0, 20) == pytest.approx(9.296, abs=1e-3)
    t = np.array([1e2, 1e4, 1e8, 1e30, 1e300])
    z = t_to_z(t, 20)
    assert np.all(np.isfinite(z)) and np.all(np.diff(z) > 0)
    # far tail: the asymptotic log sf gives z ~ sqrt(2 * df * log t) to first order
    assert z[-1] == pytest.approx(np.sqrt(2 * 20 * np.log(1e300)), rel=0.05)
    assert np.isnan(t_to_z(np.nan, 10)) and t_to_z(np.inf, 10) == np.inf


def test_p_to_z():
    # standard normal table: one-sided 0.05 -> 1.645, two-sided 0.05 -> 1.960
    assert p_to_z(0.05, "one") == pytest.approx(1.6449, abs=1e-4)
    assert p_to_z(0.05, "two") == pytest.approx(1.9600, abs=1e-4)
    assert np.all(np.isfinite(p_to_z([0.0, 1.0])))
    with pytest.raises(ConversionError, match=r"\[0, 1\]"):
        p_to_z([1.5])


def test_convert_refuses_without_dof():
    with pytest.raises(ConversionError, match="DegreesOfFreedom") as err:
        convert(np.ones(3), "t", "z", dof=None, where="/data/x.nii.gz")
    assert "/data/x.nii.gz" in str(err.value)
    with pytest.raises(ConversionError, match="cannot be converted"):
        convert(np.ones(3), "effect", "z", where="e.nii")
    out, how = convert(np.ones(3), "z", "z")
    assert how == "none"

"""Risk measures of discrete laws: VaR as lower quantile, ES with the atom split."""

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from debtsim.distribution import LossDistribution
from debtsim.risk import expected_shortfall, level_key, measures, value_at_risk


def law(losses, probs) -> LossDistribution:
    return LossDistribution.from_atoms(np.array(losses, float), np.array(probs, float),
                                       engine="test", default_probability=np.zeros(1))


def es_by_quantile_integral(dist: LossDistribution, level: float) -> float:
    """ES as (1/(1-a)) * integral_a^1 VaR_u du (Acerbi & Tasche 2002, Prop. 3.2)."""
    cdf = np.cumsum(dist.probabilities)
    lower = np.concatenate(([0.0], cdf[:-1]))
    # length of [a, 1] inside each atom's probability interval [lower, cdf]
    width = np.clip(cdf - np.maximum(lower, level), 0.0, None)
    return float(np.dot(width, dist.losses) / (1.0 - level))


def test_var_is_lower_quantile_at_an_atom() -> None:
    """VaR is inf{l : P(L <= l) >= a}, so a CDF value equal to a picks that atom."""
    d = law([0, 10, 100], [0.95, 0.04, 0.01])
    assert value_at_risk(d, 0.99) == 10
    assert value_at_risk(d, 0.95) == 0
    assert value_at_risk(d, 0.991) == 100


def test_es_with_atoms_hand_computed() -> None:
    """ES splits the VaR atom: (E[L 1{L>VaR}] + VaR (P(L<=VaR) - a)) / (1 - a)."""
    # Acerbi & Tasche (2002), eq. (3.3): hand values 55 and 100 for this law.
    d = law([0, 10, 100], [0.95, 0.04, 0.01])
    assert expected_shortfall(d, 0.98) == pytest.approx(55.0)
    assert expected_shortfall(d, 0.99) == pytest.approx(100.0)


@settings(max_examples=200, deadline=None)
@given(
    st.lists(st.tuples(st.floats(0, 1e6), st.floats(1e-6, 1.0)), min_size=1, max_size=30),
    st.floats(0.5, 0.9999),
)
def test_es_equals_quantile_integral(atoms, level) -> None:
    """ES with the atom split equals the integral of the quantile function above a."""
    losses, probs = zip(*atoms, strict=True)
    d = law(losses, probs)
    assert expected_shortfall(d, level) == pytest.approx(es_by_quantile_integral(d, level),
                                                         rel=1e-9, abs=1e-6)


@settings(max_examples=200, deadline=None)
@given(
    st.lists(st.tuples(st.floats(0, 1e6), st.floats(1e-6, 1.0)), min_size=1, max_size=30),
    st.floats(0.5, 0.99),
    st.floats(0.0001, 0.0099),
)
def test_es_dominates_var_and_both_rise_with_level(atoms, level, step) -> None:
    """ES >= VaR, and both are non-decreasing in the confidence level."""
    losses, probs = zip(*atoms, strict=True)
    d = law(losses, probs)
    lo, hi = level, level + step
    assert expected_shortfall(d, lo) >= value_at_risk(d, lo) - 1e-9
    assert value_at_risk(d, hi) >= value_at_risk(d, lo)
    assert expected_shortfall(d, hi) >= expected_shortfall(d, lo) - 1e-6


def test_measures_keys_use_str_float() -> None:
    """Levels are keyed as str(float), economic capital is VaR minus EL."""
    d = law([0, 10, 100], [0.95, 0.04, 0.01])
    m = measures(d, [0.99, 0.999])
    assert set(m.var) == {0.99, 0.999}
    assert m.to_dict()["var"].keys() == {"0.99", "0.999"} == {level_key(0.99), level_key(0.999)}
    assert m.expected_loss == pytest.approx(1.4)
    assert m.economic_capital[0.99] == pytest.approx(10 - 1.4)


def test_level_outside_unit_interval_is_refused() -> None:
    """A confidence level of 1 or more is an error naming the value."""
    d = law([0, 1], [0.5, 0.5])
    with pytest.raises(ValueError, match="got 1.0"):
        value_at_risk(d, 1.0)


def test_from_atoms_merges_float_noise_and_normalises() -> None:
    """Atoms equal up to float noise merge; probabilities sum to one."""
    d = law([0.1 + 0.2, 0.3, 1.0], [0.25, 0.25, 0.5])
    assert d.losses.size == 2
    assert d.probabilities.sum() == pytest.approx(1.0, abs=1e-15)

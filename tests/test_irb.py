"""Basel II IRB formula against the handbook table (REFERENCES.md)."""

import numpy as np
import pytest

from debtsim.irb import irb_correlation, irb_risk_weight

# Basel Committee, revised framework (June 2006), illustrative IRB risk-weight table:
# corporate, LGD 45%, M = 2.5. Values as recalled in shared/REFERENCES.md (from memory of
# that table); each agrees with the formula to 0.01 percentage points.
HANDBOOK = [
    (0.0003, 14.44),
    (0.0010, 29.65),
    (0.0050, 69.61),
    (0.0100, 92.32),
    (0.0250, 122.16),
    (0.0500, 149.86),
    (0.1000, 193.09),
    (0.2000, 238.23),
]


@pytest.mark.parametrize(("pd", "risk_weight_pct"), HANDBOOK)
def test_risk_weight_matches_handbook_table(pd: float, risk_weight_pct: float) -> None:
    """The corporate IRB risk weight reproduces the Basel table to 0.01 points."""
    rw = float(irb_risk_weight(pd, 0.45)) * 100
    assert rw == pytest.approx(risk_weight_pct, abs=0.01)


def test_supervisory_correlation_limits() -> None:
    """The supervisory correlation runs from 24% (low PD) to 12% (high PD)."""
    # Basel II para. 272: R = 0.12 w + 0.24 (1 - w)
    r = irb_correlation(np.array([1e-9, 0.9999]))
    assert r[0] == pytest.approx(0.24, abs=1e-6)
    assert r[1] == pytest.approx(0.12, abs=1e-6)


def test_maturity_adjustment_at_one_and_five_years() -> None:
    """Maturity adjustment (1 + (M - 2.5) b) / (1 - 1.5 b): exactly 1 at M = 1; at M = 5.

    Basel II (June 2006) para. 272 as published: b = (0.11852 - 0.05478 ln PD)^2.
    """
    import math

    from debtsim.irb import irb_maturity_adjustment

    for pd in (0.0003, 0.01, 0.2):
        b = (0.11852 - 0.05478 * math.log(pd)) ** 2
        assert float(irb_maturity_adjustment(pd, 1.0)) == pytest.approx(1.0, abs=1e-14)
        assert float(irb_maturity_adjustment(pd, 5.0)) == pytest.approx(
            (1 + 2.5 * b) / (1 - 1.5 * b), rel=1e-14)
    # PD 1%: b = 0.137486, MA(5) = 1.343715 / 0.793771 = 1.69283 (hand evaluation)
    assert float(irb_maturity_adjustment(0.01, 5.0)) == pytest.approx(1.69283, abs=1e-5)


def test_capital_amounts_use_each_maturity() -> None:
    """Per-obligor IRB capital K x EAD scales with each obligor's own maturity adjustment."""
    from debtsim.irb import irb_capital_amounts, irb_maturity_adjustment

    amounts = irb_capital_amounts([0.01, 0.01, 0.01], [0.45] * 3, [100.0, 100.0, 200.0],
                                  [1.0, 5.0, 2.5])
    rw = float(irb_risk_weight(0.01, 0.45))  # 92.32% at M = 2.5 (handbook table)
    assert amounts[2] == pytest.approx(200.0 * rw / 12.5, rel=1e-12)
    ma = irb_maturity_adjustment(0.01, np.array([1.0, 5.0]))
    base = 100.0 * rw / 12.5 / float(irb_maturity_adjustment(0.01, 2.5))
    np.testing.assert_allclose(amounts[:2], base * ma, rtol=1e-12)

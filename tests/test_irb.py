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

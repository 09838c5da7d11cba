"""Observed-order extrapolation (Richardson; Roache 1998) on exact sequences."""
import numpy as np
import pytest

from volmag.convergence import observed_order


@pytest.mark.parametrize("p", [1.0, 1.5, 2.0])
def test_recovers_order_and_limit(p):
    h = np.array([0.3, 0.2, 0.13])
    q = 2.5 - 0.7 * h ** p
    limit, order = observed_order(h, q)
    assert abs(order - p) < 1e-8 and abs(limit - 2.5) < 1e-10


def test_refuses_oscillating_values():
    with pytest.raises(ValueError):
        observed_order([0.3, 0.2, 0.1], [1.0, 1.1, 1.0])

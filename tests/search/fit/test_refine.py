"""search.fit.refine: the bounded Brent coroutine the per-channel refinement runs in lockstep."""
import math

import numpy as np
import pytest
from scipy.optimize import minimize_scalar

from burstlens.search.fit.refine import bounded_brent


@pytest.mark.parametrize("f", [lambda x: (x - 0.3) ** 2, lambda x: math.cos(3 * x) + 0.1 * x,
                               lambda x: abs(x + 0.7) ** 1.5])
def test_bounded_brent_takes_scipys_steps(f):
    """Started where scipy starts (a + (3 − √5)/2·(b − a)), the coroutine proposes exactly the
    trial points of scipy.optimize.minimize_scalar(method="bounded") and ends at its minimum
    (reference library; R. P. Brent, Algorithms for Minimization without Derivatives, 1973)."""
    a, b, xatol = -2.0, 1.5, 1e-5
    seen = []
    ref = minimize_scalar(lambda x: seen.append(x) or f(x), bounds=(a, b), method="bounded",
                          options={"xatol": xatol, "maxiter": 500})
    x0 = a + 0.5 * (3 - math.sqrt(5)) * (b - a)
    gen = bounded_brent(a, b, x0, f(x0), xatol, 500)
    ours = []
    try:
        x = next(gen)
        while True:
            ours.append(x)
            x = gen.send(f(x))
    except StopIteration as stop:
        x_best, f_best = stop.value
    assert np.allclose(ours, seen[1:], rtol=0, atol=1e-15)
    assert x_best == pytest.approx(ref.x, abs=1e-12) and f_best == pytest.approx(ref.fun)

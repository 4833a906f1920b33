"""Vectorised leave-one-out refits against the plain loop of ``combine`` fits.

The reference is this project's own ``combine`` (itself checked against statsmodels'
``combine_effects`` and published examples in test_pooling_meta.py) applied to each subset in
turn; the vectorised form must give the same numbers.  Tolerance: 1e-9 relative on the estimate
and SE and 1e-9 of the total variance's scale on tau2 -- the REML iteration stops at 1e-12 of
that scale, and the two forms differ otherwise only in summation order.
"""

from __future__ import annotations

import numpy as np
import pytest

from takeup.pipeline.stats.meta_analysis.leave_one_out import _loop, leave_one_out_fits
from takeup.pipeline.stats.meta_analysis.meta import combine


def _data(seed: int, k: int, tau: float, spread: float = 1.0):
    rng = np.random.default_rng(seed)
    v = rng.uniform(0.2, 2.0, k) ** 2 * spread
    y = 3.0 + rng.normal(0.0, tau, k) + rng.normal(0.0, np.sqrt(v))
    return y, v


@pytest.mark.parametrize("method", ["reml", "dl", "fixed", "pm"])
@pytest.mark.parametrize("seed,k,tau", [(1, 3, 0.0), (2, 8, 1.0), (3, 40, 0.3), (4, 250, 2.0), (5, 60, 0.0)])
def test_vectorised_equals_the_loop(method, seed, k, tau):
    y, v = _data(seed, k, tau)
    assert combine(y, v, method=method).method == method          # the resolved name is what is passed on
    est, se, tau2, conv = leave_one_out_fits(y, v, method)
    ref_est, ref_se, ref_tau2, ref_conv = _loop(y, v, method)
    scale = float(np.mean(v))
    np.testing.assert_allclose(est, ref_est, rtol=1e-9, atol=1e-12 * scale)
    np.testing.assert_allclose(se, ref_se, rtol=1e-9)
    np.testing.assert_allclose(tau2, ref_tau2, rtol=0, atol=1e-9 * scale)
    assert conv == ref_conv


def test_units_do_not_matter_and_blocks_do_not_change_results(monkeypatch):
    y, v = _data(7, 120, 1.5)
    est, se, tau2, _ = leave_one_out_fits(y, v, "reml")
    big = leave_one_out_fits(1e6 * y - 4e7, 1e12 * v, "reml")      # location-scale equivariance
    np.testing.assert_allclose(big[0], 1e6 * est - 4e7, rtol=1e-9)
    np.testing.assert_allclose(big[2], 1e12 * tau2, rtol=0, atol=1e-9 * 1e12 * np.mean(v))
    import takeup.pipeline.stats.meta_analysis.leave_one_out as loo
    monkeypatch.setattr(loo, "_BLOCK_CELLS", 7 * 120)               # blocks of 7 subsets
    small = leave_one_out_fits(y, v, "reml")
    np.testing.assert_allclose(small[2], tau2, rtol=1e-13)        # BLAS may sum a block in another order
    np.testing.assert_allclose(small[0], est, rtol=1e-13)

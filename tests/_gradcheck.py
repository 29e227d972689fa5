"""Central-difference check of the analytic marginal-likelihood gradient
(``mapping._linmodel.log_marginal_and_grad``), shared by the map tests."""

import numpy as np
import pytest

from mapping import _linmodel


def check_marginal_gradient(st, prior, noise, offset_var, rng, *, n_prior=6, h=1e-5):
    """Assert the value equals ``log_marginal`` and each derivative (w.r.t.
    the log prior variances at ``n_prior`` random indices, the log noise
    variances and, with walks, the log offset variance) equals the central
    difference of ``log_marginal``."""
    val, dp, dn, do = _linmodel.log_marginal_and_grad(st, prior, noise, offset_var)
    assert val == pytest.approx(_linmodel.log_marginal(st, prior, noise, offset_var), rel=1e-10)

    def central(p=prior, n=noise, o=offset_var, step=None):
        return (_linmodel.log_marginal(st, *(x * np.exp(s) for x, s in zip((p, n, o), step)))
                - _linmodel.log_marginal(st, *(x * np.exp(-s) for x, s in zip((p, n, o), step)))) / (2 * h)

    for k in rng.choice(prior.size, n_prior, replace=False):
        e = np.zeros(prior.size)
        e[k] = h
        assert dp[k] == pytest.approx(central(step=(e, 0.0, 0.0)), rel=1e-4, abs=1e-6)
    for j in range(np.size(noise)):
        e = np.zeros(np.size(noise))
        e[j] = h
        assert dn[j] == pytest.approx(central(step=(0.0, e, 0.0)), rel=1e-5)
    if st.n_walks:
        assert do == pytest.approx(central(step=(0.0, 0.0, h)), rel=1e-5)

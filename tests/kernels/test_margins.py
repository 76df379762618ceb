"""Range-margin kernels: extreme means and their bootstrap."""

import numpy as np
import pytest

from envelope.errors import InputError
from envelope.kernels.margins import bootstrap_extreme_means, extreme_mean, poleward_sign


def test_extreme_mean_against_sorting():
    # Analytic: the mean of the n largest equals the mean of the sorted tail (a direct sort).
    rng = np.random.default_rng(0)
    v = rng.normal(size=101)
    assert extreme_mean(v, 10) == pytest.approx(np.sort(v)[-10:].mean())
    assert extreme_mean(v, 10, largest=False) == pytest.approx(np.sort(v)[:10].mean())
    with pytest.raises(InputError, match="only 101 are occupied"):
        extreme_mean(v, 102)


def test_bootstrap_of_a_constant_is_the_constant_and_poleward_sign():
    # Analytic: every resample of identical values has the same extreme mean.
    reps = bootstrap_extreme_means(np.full(20, 3.0), 5, 50, np.random.default_rng(1))
    assert np.all(reps == 3.0)
    assert poleward_sign([-40.0, -35.0]) == -1.0 and poleward_sign([10.0, -5.0]) == 1.0

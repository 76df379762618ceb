"""METHODS registry and make_estimator."""

import pytest

from envelope.errors import InputError
from envelope.models import METHODS, PointProcessModel, make_estimator


def test_make_estimator_and_errors():
    # Common practice, no source: registry names map to classes; unknown names are errors
    assert set(METHODS) == {"pointprocess", "envelope", "brt", "forest", "ensemble"}
    est = make_estimator("pointprocess", C=3.0)
    assert isinstance(est, PointProcessModel) and est.C == 3.0
    with pytest.raises(InputError, match="method: got 'unknownmethod'"):
        make_estimator("unknownmethod")
    with pytest.raises(InputError, match="unknown parameter 'depth'"):
        make_estimator("forest", depth=3)

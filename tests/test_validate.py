"""tripletkit._validate: the shared input checks and their messages."""

import numpy as np
import pytest

from tripletkit._errors import TripletkitError
from tripletkit import _validate as V


def test_unit_rows_within_the_tolerance_pass():
    V.check_unit(np.array([[1.0, 0.0], [0.0, 1.0 + 0.9e-3]], np.float32))
    with pytest.raises(TripletkitError, match=r"^embeddings has 1 rows whose L2 norm is not 1 \(first row positions: \[1\]\)"):
        V.check_unit(np.array([[1.0, 0.0], [0.0, 1.01]], np.float32))


@pytest.mark.parametrize("distance,top", [("squared", 4.0), ("euclidean", 2.0)])
def test_margin_must_be_reachable(distance, top):
    V.check_margin(top * 0.99, distance)
    with pytest.raises(TripletkitError, match=rf"margin = {top} cannot be reached with distance = {distance}"):
        V.check_margin(top, distance)


def test_whole_numbers_choices_flags_and_distances():
    assert V.whole_number(np.int64(3), "rows", low=1) == 3
    assert V.whole_number(None, "rows", allow_none=True) is None
    for bad in (0, 1.5, True, "2"):
        with pytest.raises(TripletkitError, match=r"^rows must be a whole number >= 1, got"):
            V.whole_number(bad, "rows", low=1)
    assert V.check_choice("ivf", "index", ("exact", "ivf")) == "ivf"
    with pytest.raises(TripletkitError, match=r"^index must be one of 'exact', 'ivf', got 'flat'"):
        V.check_choice("flat", "index", ("exact", "ivf"))
    assert V.check_flag(np.bool_(True), "soft") is True
    with pytest.raises(TripletkitError, match=r"^soft must be True or False, got 1"):
        V.check_flag(1, "soft")
    with pytest.raises(TripletkitError, match=r"^distance must be 'squared' or 'euclidean', got 'cosine'"):
        V.check_distance("cosine")

"""The shared photometry container and validator."""

import astropy.units as u
import numpy as np
import pytest

from sedtemp.errors import InputError
from sedtemp.photometry import photometry_problems, prepare, validate


def test_prepare_converts_units_and_marks_missing():
    p = prepare([1.0, np.nan, 3.0] * u.mJy, [0.1, np.nan, 0.3] * u.mJy, ["a", "b", "c"])
    np.testing.assert_allclose(p.flux, [[1e-29, 0.0, 3e-29]], rtol=1e-15)  # exact unit conversion
    assert p.missing.tolist() == [[False, True, False]] and np.isinf(p.err[0, 1])
    assert p.n_usable.tolist() == [2]


def test_masked_entries_are_missing_and_problems_are_listed():
    with pytest.warns(UserWarning, match="flux given as bare numbers: taken in Jy"):
        p = prepare(np.ma.masked_array([1.0, 5e4, 3.0], mask=[False, True, False]), [0.1, 0.2, 0.3] * u.Jy,
                    ["a", "b", "c"])
    assert p.missing.tolist() == [[False, True, False]]
    probs = photometry_problems(np.array([[1.0, 2.0], [np.nan, 1.0]]), np.array([[0.0, 1.0], [1.0, 1.0]]), ["a", "b"])
    assert [m for m, _ in probs] == ["band 'a': flux is NaN; mark an unobserved band with NaN in both flux and error",
                                     "band 'a': flux_err must be positive"]
    with pytest.raises(InputError, match=r"source 'x', band 'a': flux_err must be positive, got 0 W m-2 Hz-1"):
        validate(np.array([[1.0, 2.0]]), np.array([[0.0, 1.0]]), ["a", "b"], source_label=["x"])

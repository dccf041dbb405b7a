"""Ring layouts and width parsing."""

import numpy as np
import pytest

from tiltedring.errors import InputError
from tiltedring.fitting.rings import RingLayout, parse_width


def test_parse_width_units():
    assert parse_width("9arcsec", 2.0, 8.0) == 9.0
    assert parse_width("9", 2.0, 8.0) == 9.0
    assert parse_width("4pix", 2.0, 8.0) == 8.0
    assert parse_width("0.5beam", 2.0, 8.0) == 4.0
    assert parse_width("1arcmin", 2.0) == 60.0
    with pytest.raises(InputError, match="no beam"):
        parse_width("1beam", 2.0, None)
    with pytest.raises(InputError, match="cannot read length"):
        parse_width("9 parsecs", 2.0)


def test_uniform_layout_reaches_max_radius():
    lay = RingLayout.uniform(8.0, 100.0, first_radius=4.0)
    assert lay.edges[0] == 4.0 and np.allclose(lay.widths, 8.0)
    assert abs(lay.edges[-1] - 100.0) <= 4.0
    np.testing.assert_allclose(lay.radii, 0.5 * (lay.inner + lay.outer))


def test_logarithmic_layout_grows():
    lay = RingLayout.logarithmic(4.0, 200.0, growth=1.25)
    assert np.allclose(lay.widths[1:] / lay.widths[:-1], 1.25)


def test_explicit_layout_validated():
    assert len(RingLayout.explicit([0, 5, 12, 30])) == 3
    with pytest.raises(InputError, match="increasing"):
        RingLayout.explicit([0, 10, 5])
    with pytest.raises(InputError, match="no room"):
        RingLayout.uniform(50.0, 20.0)

"""Sediment unloading against the closed form (Sclater & Christie 1980 compaction, Airy isostasy)."""
import math

import numpy as np
import pytest

from agegrid.sediment import LITHOLOGIES


@pytest.mark.parametrize("h", [1000.0, 3000.0])
def test_correction_closed_form_shale(h):
    # Sclater & Christie (1980) shale: phi0 0.63, c 0.51 /km, grain 2720 kg/m3 (values from memory);
    # rho_w 1030, rho_m 3330. Mean porosity phi0 (1 - e^{-ch}) / (ch), Airy: h (rho_m - rho_s)/(rho_m - rho_w)
    ch = 0.51 * h / 1000
    phi = 0.63 * (1 - math.exp(-ch)) / ch
    rho_s = phi * 1030 + (1 - phi) * 2720
    expected = h * (3330 - rho_s) / (3330 - 1030)
    assert LITHOLOGIES["shale"].correction(np.array([h]))[0] == pytest.approx(expected, rel=1e-12)


def test_correction_values_by_hand():
    # the same numbers worked by hand: 627.8 m at 1 km, 1506.8 m at 3 km
    c = LITHOLOGIES["shale"].correction(np.array([1000.0, 3000.0]))
    assert c == pytest.approx([627.8, 1506.8], abs=0.2)


def test_thin_and_missing_sediment():
    c = LITHOLOGIES["deep_sea"].correction(np.array([0.0, np.nan, 1e-6]))
    assert c[0] == 0.0 and np.isnan(c[1]) and c[2] == pytest.approx(1e-6 * (3330 - 0.63 * 1030 - 0.37 * 2720) / 2300)

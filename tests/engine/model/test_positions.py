"""Strike and pickup weights: interpolation, seams, errors that name the JSON path."""

import numpy as np
import pytest

from sheafsynth.engine.errors import PresetError
from sheafsynth.engine.model.complexes import complex_from_spec
from sheafsynth.engine.model.positions import position_weights
from tests.engine.model.test_field_sheaf import sheaf


def test_position_weights_interpolate():
    cx = complex_from_spec({"path": 11})
    w = position_weights(cx, 0.25)
    np.testing.assert_allclose(w[[2, 3]], [0.5, 0.5])
    assert w.sum() == pytest.approx(1.0)
    np.testing.assert_allclose(position_weights(cx, 1.0)[10], 1.0)
    grid = complex_from_spec({"grid": [5, 9]})
    w = position_weights(grid, [0.375, 0.5]).reshape(5, 9)    # x0 = 1.5, x1 = 4
    np.testing.assert_allclose(w[[1, 2], 4], [0.5, 0.5])
    # the weighted coordinate equals the requested position (bilinear exactness)
    for at in ([0.1, 0.9], [0.33, 0.71]):
        w = position_weights(grid, at)
        np.testing.assert_allclose(w @ grid.coords, at, atol=1e-12)
    assert position_weights(grid, {"vertex": 17})[17] == 1.0
    # across the Mobius seam the far vertices are flipped in row and sign
    mob = sheaf({"grid": [5, 8], "wrap": "mobius"})
    w = position_weights(mob.complex, [0.25, 0.9375], sheaf=mob).reshape(5, 8)
    assert w[1, 7] == pytest.approx(0.5) and w[3, 0] == pytest.approx(-0.5)
    ring = sheaf({"path": 8, "wrap": "ring"})
    np.testing.assert_allclose(position_weights(ring.complex, 0.9375)[[7, 0]], [0.5, 0.5])


def test_bad_positions_name_path():
    grid = complex_from_spec({"grid": [4, 4]})
    with pytest.raises(PresetError, match=r"cells\[0\]\.pickup\.at\[1\]"):
        position_weights(grid, [0.5, 1.5], "cells[0].pickup.at")
    with pytest.raises(PresetError, match=r"cells\[0\]\.pickup\.at"):
        position_weights(grid, 0.5, "cells[0].pickup.at")
    with pytest.raises(PresetError, match=r"cells\[0\]\.strike\.at\.vertex"):
        position_weights(grid, {"vertex": 16}, "cells[0].strike.at")
    tri = complex_from_spec({"vertices": 3, "edges": [[0, 1], [1, 2]]})
    with pytest.raises(PresetError, match=r"cells\[0\]\.strike\.at"):
        position_weights(tri, 0.3, "cells[0].strike.at")

"""Cell complexes: generators, their metadata, and errors that name the JSON path."""

import pytest

from sheafsynth.engine.errors import PresetError
from sheafsynth.engine.model.complexes import complex_from_spec
from sheafsynth.engine.model.field_sheaf import FieldSheaf
from sheafsynth.engine.model.spectra import gershgorin_bound


@pytest.mark.parametrize("spec,where", [
    ({"grid": [1, 5]}, r"cells\[3\]\.complex\.grid\[0\]"),
    ({"grid": [4, "x"]}, r"cells\[3\]\.complex\.grid\[1\]"),
    ({"grid": [4, 4], "wrap": "klein"}, r"cells\[3\]\.complex\.wrap"),
    ({"path": 1}, r"cells\[3\]\.complex\.path"),
    ({"path": 5, "wrap": "torus"}, r"cells\[3\]\.complex\.wrap"),
    ({"path": 5, "size": 3}, r"cells\[3\]\.complex\.size"),
    ({"grid": [3, 3], "path": 4}, r"cells\[3\]\.complex"),
    ("grid", r"cells\[3\]\.complex"),
    ({"vertices": 3, "edges": [[0, 1], [1, 3]]}, r"cells\[3\]\.complex\.edges\[1\]\[1\]"),
    ({"vertices": 3, "edges": [[0, 0]]}, r"cells\[3\]\.complex\.edges\[0\]"),
    ({"vertices": 3, "edges": []}, r"cells\[3\]\.complex\.edges"),
    ({"vertices": 4, "edges": [[0, 1], [1, 2], [2, 3]], "faces": [[0, 1, 2]]},
     r"cells\[3\]\.complex\.faces\[0\]: .*do not close"),
    ({"vertices": 3, "edges": [[0, 1], [1, 2], [2, 0]], "faces": [[0, 1, 5]]},
     r"cells\[3\]\.complex\.faces\[0\]\[2\]"),
])
def test_bad_complex_names_path(spec, where):
    with pytest.raises(PresetError, match=where):
        complex_from_spec(spec, "cells[3].complex")


def test_generator_metadata():
    cx = complex_from_spec({"grid": [4, 6], "wrap": "cylinder"})
    assert cx.shape == (4, 6) and cx.wrapped == (False, True)
    assert cx.boundary.reshape(4, 6)[[0, 3]].all() and not cx.boundary.reshape(4, 6)[1:3].any()
    assert len(cx.faces) == 3 * 6 and cx.n_edges == 4 * 6 + 3 * 6
    assert gershgorin_bound(FieldSheaf.from_spec(cx).laplacian()) == 8.0
    tor = complex_from_spec({"grid": [4, 6], "wrap": "torus"})
    assert not tor.boundary.any() and len(tor.faces) == 24 and tor.n_edges == 48
    tri = complex_from_spec({"vertices": 3, "edges": [[0, 1], [1, 2], [0, 2]], "faces": [[0, 1, 2]]})
    assert tri.faces[0].signs == (1, 1, -1) and tri.boundary.all()

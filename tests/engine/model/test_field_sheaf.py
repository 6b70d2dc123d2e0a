"""Field sheaves: Laplacian against networkx, H^0, twists, holonomy, the bending operator and published spectra."""

import math

import networkx as nx
import numpy as np
import pytest
import scipy.linalg as sla

from sheafsynth.engine.errors import PresetError
from sheafsynth.engine.model.complexes import complex_from_spec
from sheafsynth.engine.model.field_sheaf import FieldSheaf, check_consistency, field_sheaf_from_cell
from sheafsynth.engine.model.spectra import largest_eigenvalue, lowest_eigenvalues


def sheaf(spec, stalk=1, twist=None):
    return FieldSheaf.from_spec(complex_from_spec(spec), stalk, twist)


def explicit_from_nx(g):
    """Explicit complex spec from a networkx graph on nodes 0..V-1."""
    return {"vertices": g.number_of_nodes(), "edges": [[int(i), int(j)] for i, j in g.edges()]}


def distinct(values, rel=1e-6):
    out = []
    for v in values:
        if not out or abs(v - out[-1]) > rel * max(1.0, abs(v)):
            out.append(v)
    return out


# --------------------------------------------------------------------------
# Constant sheaf R = graph Laplacian
# Source: Hansen & Ghrist 2019, "Toward a spectral theory of cellular
# sheaves" (constant sheaf Laplacian = graph Laplacian, H^0 = components);
# NetworkX as reference library.

def _graphs():
    rng_graph = nx.gnm_random_graph(30, 55, seed=7)
    disconnected = nx.disjoint_union_all([nx.path_graph(5), nx.cycle_graph(6),
                                          nx.complete_graph(4), nx.empty_graph(2)])
    return {
        "path": ({"path": 9}, nx.path_graph(9), None),
        "cycle": ({"path": 11, "wrap": "ring"}, nx.cycle_graph(11), None),
        "grid": ({"grid": [5, 7]}, nx.grid_2d_graph(5, 7),
                 [(i, j) for i in range(5) for j in range(7)]),
        "torus": ({"grid": [4, 6], "wrap": "torus"}, nx.grid_2d_graph(4, 6, periodic=True),
                  [(i, j) for i in range(4) for j in range(6)]),
        "random": (explicit_from_nx(rng_graph), rng_graph, None),
        "disconnected": (explicit_from_nx(disconnected), disconnected, None),
    }


@pytest.mark.parametrize("name", list(_graphs()))
def test_constant_sheaf_laplacian_equals_networkx(name):
    spec, g, nodes = _graphs()[name]
    s = sheaf(spec)
    nodelist = nodes if nodes is not None else sorted(g.nodes())
    ref = nx.laplacian_matrix(g, nodelist=nodelist).toarray()
    # Hansen & Ghrist 2019; NetworkX as reference library
    np.testing.assert_allclose(s.laplacian("free").toarray(), ref, atol=1e-12)
    assert s.h0_dim() == nx.number_connected_components(g)


def test_h0_counts_components_on_large_graph():
    """Sparse (shift-invert) route for dim H^0. Hansen & Ghrist 2019; NetworkX."""
    g = nx.disjoint_union_all([nx.grid_2d_graph(20, 20), nx.path_graph(300), nx.cycle_graph(50)])
    g = nx.convert_node_labels_to_integers(g)
    s = sheaf(explicit_from_nx(g))
    assert s.n_dofs > 600
    assert s.h0_dim() == nx.number_connected_components(g) == 3


# --------------------------------------------------------------------------
# Twisted sheaves

def test_twisted_cycle_has_no_global_section():
    """A cycle with one restriction map -1 has H^0 = 0 (Hansen & Ghrist 2019)."""
    assert sheaf({"path": 10, "wrap": "ring"}, twist={"seam": -1}).h0_dim() == 0
    assert sheaf({"path": 10, "wrap": "ring"}, twist={"edges": [4], "sign": -1}).h0_dim() == 0
    assert sheaf({"path": 10, "wrap": "ring"}).h0_dim() == 1


def test_mobius_and_cylinder_h0():
    """Mobius strip with sign seam: H^0 = 0; untwisted cylinder: H^0 = 1
    (Hansen & Ghrist 2019: twisted constant sheaf has no global section)."""
    mob = sheaf({"grid": [6, 9], "wrap": "mobius"})
    assert mob.h0_dim() == 0
    assert mob.face_holonomies() == []          # locally consistent, globally twisted
    cyl = sheaf({"grid": [6, 9], "wrap": "cylinder"})
    assert cyl.h0_dim() == 1
    assert sheaf({"grid": [6, 9], "wrap": "mobius"}, twist={"seam": 1}).h0_dim() == 1
    assert sheaf({"grid": [6, 9], "wrap": "cylinder"}, twist={"seam": -1}).h0_dim() == 0
    # going around twice (row 2, seam, row 3, seam) crosses the seam twice: +1
    cx = mob.complex

    def row_edges(c, r):
        return [k for k in range(c.n_edges)
                if c.edge_axis[k] == 1 and c.seam[k] < 0 and c.edges[k, 0] // c.shape[1] == r]

    def seam_from(c, r):
        last = r * c.shape[1] + c.shape[1] - 1
        return int(np.flatnonzero((c.seam == 1) & (c.edges[:, 0] == last))[0])

    walk = row_edges(cx, 2) + [seam_from(cx, 2)] + row_edges(cx, 3) + [seam_from(cx, 3)]
    np.testing.assert_allclose(mob.holonomy(walk, [1] * len(walk)), [[1.0]])
    # odd height: the middle row closes through the seam, the core loop: -1
    odd = sheaf({"grid": [5, 9], "wrap": "mobius"})
    core = row_edges(odd.complex, 2) + [seam_from(odd.complex, 2)]
    np.testing.assert_allclose(odd.holonomy(core, [1] * len(core)), [[-1.0]])
    with pytest.raises(ValueError):
        odd.holonomy(core[:-1], [1] * (len(core) - 1))


def test_torus_edge_twist_reports_two_faces():
    s = sheaf({"grid": [4, 5], "wrap": "torus"}, twist={"edges": [3], "sign": -1})
    bad = s.face_holonomies()
    assert len(bad) == 2
    for b in bad:
        assert 3 in b.edges
        np.testing.assert_allclose(b.holonomy, [[-1.0]])


@pytest.mark.parametrize("angle,h0", [(0, 2), (30, 0), (90, 0), (180, 0), (360, 2)])
def test_rotation_twist_on_ring(angle, h0):
    """d = 2 ring with a rotation seam: a section must be fixed by the rotation,
    so H^0 = 0 unless the angle is a multiple of 360 degrees (Hansen & Ghrist
    2019: H^0 = sections = fixed vectors of the holonomy on a cycle)."""
    s = sheaf({"path": 12, "wrap": "ring"}, stalk=2, twist={"seam": {"rotate": angle}})
    assert s.h0_dim() == h0


def test_holonomy_reported_for_inconsistent_two_complex():
    """A triangle with one edge rotated by 45 degrees: the face's holonomy is
    that rotation (composition of transports, Hansen & Ghrist 2019)."""
    spec = {"vertices": 4, "edges": [[0, 1], [1, 2], [2, 0], [1, 3], [3, 2]],
            "faces": [[0, 1, 2], [1, 4, 3]]}
    cx = complex_from_spec(spec)
    s = FieldSheaf.from_spec(cx, 2, {"edges": [0], "rotate": 45})
    bad = s.face_holonomies()
    assert [b.face for b in bad] == [0]
    h = bad[0].holonomy
    np.testing.assert_allclose(h.T @ h, np.eye(2), atol=1e-12)
    assert math.degrees(abs(math.atan2(h[1, 0], h[0, 0]))) == pytest.approx(45.0)
    with pytest.raises(PresetError, match=r"cells\[1\]\.consistency: .*face 0"):
        check_consistency(s, "refuse", "cells[1].consistency")
    assert len(check_consistency(s, "report", "cells[1].consistency")) == 1
    # signs on two edges of a face compose to +1: consistent
    ok = FieldSheaf.from_spec(cx, 1, {"edges": [0, 2], "sign": -1})
    assert ok.face_holonomies() == []
    odd = FieldSheaf.from_spec(cx, 1, {"edges": [1], "sign": -1})    # edge 1 borders both
    assert [b.face for b in odd.face_holonomies()] == [0, 1]


def test_twisted_second_difference_squares_to_laplacian_on_ring():
    """Internal consistency: with orthogonal maps on a ring D2^T D2 = L^2."""
    for stalk, twist in [(1, None), (1, {"seam": -1}), (2, {"edges": [3], "rotate": 70})]:
        s = sheaf({"path": 9, "wrap": "ring"}, stalk, twist)
        lap = s.laplacian().toarray()
        np.testing.assert_allclose(s.stiffness().toarray(), lap @ lap, atol=1e-12)


# --------------------------------------------------------------------------
# Spectra

@pytest.mark.parametrize("m,n", [(6, 6), (5, 8), (7, 3), (2, 9)])
def test_periodic_grid_spectrum(m, n):
    """Periodic M x N grid: eigenvalues 4 sin^2(pi j/M) + 4 sin^2(pi k/N)
    (standard result for circulant matrices)."""
    s = sheaf({"grid": [m, n], "wrap": "torus"})
    got = np.linalg.eigvalsh(s.laplacian().toarray())
    j, k = np.meshgrid(np.arange(m), np.arange(n), indexing="ij")
    ref = np.sort((4 * np.sin(np.pi * j / m) ** 2 + 4 * np.sin(np.pi * k / n) ** 2).ravel())
    np.testing.assert_allclose(got, ref, atol=1e-10)


def test_square_membrane_fixed_rim_mode_ratios():
    """42 x 42 grid, fixed rim -> 40 x 40 interior.  Mode ratios sqrt(m^2+n^2)/sqrt(2)
    = 1, 1.581, 2.000, 2.236, 2.550 within 1 % (Fletcher & Rossing, The Physics
    of Musical Instruments)."""
    s = sheaf({"grid": [42, 42]})
    lap = s.laplacian("fixed")
    assert lap.shape == (1600, 1600)
    mu = distinct(lowest_eigenvalues(lap, 14))[:5]
    ref = [1.0, 1.581, 2.000, 2.236, 2.550]
    np.testing.assert_allclose(np.sqrt(mu) / math.sqrt(mu[0]), ref, rtol=0.01)


def test_free_free_bar_mode_ratios():
    """Path of 200, free ends, stiff only: the rigid modes (translation,
    rotation) come first, then ratios 1, 2.756, 5.404, 8.933 within 2 %
    (Fletcher & Rossing; beta L = 4.730, 7.853, 10.996, 14.137)."""
    s = sheaf({"path": 200})
    stiff = s.stiffness("free").toarray()
    ev = np.linalg.eigvalsh(stiff)
    assert np.all(np.abs(ev[:2]) < 1e-9) and ev[2] > 1e-9
    ratios = np.sqrt(ev[2:6] / ev[2])
    ref = [1.0, 2.756, 5.404, 8.933]
    np.testing.assert_allclose(ratios, ref, rtol=0.02)
    np.testing.assert_allclose((np.array([4.730, 7.853, 10.996, 14.137]) / 4.730) ** 2, ref,
                               rtol=1e-3)
    # Bilbao 2009 ch. 7 ghost-point free ends give W^-1 D2^T D2 with half end
    # masses: the same ratios, so the symmetric form is the same bar to O(h)
    w = np.ones(200)
    w[[0, -1]] = 0.5
    gev = sla.eigh(stiff, np.diag(w), eigvals_only=True)
    np.testing.assert_allclose(np.sqrt(gev[2:6] / gev[2]), ref, rtol=0.02)


def test_fixed_bar_is_simply_supported():
    """Fixed ends remove the end vertices: the operator equals L_int^2
    (u = 0, u_xx = 0), whose modes go as n^2 (Fletcher & Rossing, hinged bar)."""
    s = sheaf({"path": 120})
    lap = s.laplacian("fixed").toarray()
    np.testing.assert_allclose(s.stiffness("fixed").toarray(), lap @ lap, atol=1e-12)
    ev = np.linalg.eigvalsh(s.stiffness("fixed").toarray())
    np.testing.assert_allclose(np.sqrt(ev[:4] / ev[0]), [1, 4, 9, 16], rtol=0.01)


def test_ring_bar_stiffness_spectrum():
    """S = D2^T D2 on a ring: s_max = 16 (eigenvalues (4 sin^2(pi k/N))^2,
    circulant, standard result), so a stiff bar needs beta <= 1/2 (Bilbao 2009 ch. 7)."""
    ring = sheaf({"path": 40, "wrap": "ring"})
    assert largest_eigenvalue(ring.stiffness()) == pytest.approx(16.0)
    k = np.arange(40)
    ref = np.sort((4 * np.sin(np.pi * k / 40) ** 2) ** 2)
    np.testing.assert_allclose(np.sort(np.linalg.eigvalsh(ring.stiffness().toarray())), ref, atol=1e-9)


@pytest.mark.parametrize("cell,where", [
    ({"complex": {"path": 6}, "twist": {"seam": -1}}, r"cells\[2\]\.twist\.seam"),
    ({"complex": {"path": 6, "wrap": "ring"}, "twist": {"seam": {"rotate": 30}}},
     r"cells\[2\]\.twist\.seam\.rotate"),
    ({"complex": {"path": 6, "wrap": "ring"}, "twist": {"edges": [9], "sign": -1}},
     r"cells\[2\]\.twist\.edges\[0\]"),
    ({"complex": {"path": 6, "wrap": "ring"}, "twist": {"edges": [1], "sign": 2}},
     r"cells\[2\]\.twist\.sign"),
    ({"complex": {"grid": [3, 3], "wrap": "cylinder"}, "twist": {"seam": -1, "axis": 0}},
     r"cells\[2\]\.twist\.axis"),
    ({"complex": {"path": 6, "wrap": "ring"}, "stalk": 2,
      "twist": [{"seam": 1}, {"edges": [0], "matrix": [[1, 0], [0, 0]]}]},
     r"cells\[2\]\.twist\[1\]\.matrix"),
    ({"complex": {"path": 6}, "stalk": 0}, r"cells\[2\]\.stalk"),
])
def test_bad_twist_names_path(cell, where):
    with pytest.raises(PresetError, match=where):
        field_sheaf_from_cell(cell, "cells[2]")


def test_bad_boundary_and_consistency_name_path():
    s = sheaf({"grid": [2, 2]})
    with pytest.raises(PresetError, match=r"cells\[0\]\.boundary: .*fixed"):
        s.laplacian("clamped", path="cells[0].boundary")
    with pytest.raises(PresetError, match=r"cells\[0\]\.boundary: .*no state"):
        s.laplacian("fixed", path="cells[0].boundary")
    with pytest.raises(PresetError, match=r"cells\[0\]\.consistency"):
        check_consistency(s, "ignore", "cells[0].consistency")

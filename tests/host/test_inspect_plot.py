"""``inspect --plot``: a picture of the network, each field's complex and its lowest mode shapes."""

from __future__ import annotations

import os
import subprocess
import sys
import xml.etree.ElementTree as ET

import matplotlib.image as mpimg
import numpy as np
import pytest

from sheafsynth.engine.model.sheaf import sheaf_of
from sheafsynth.engine.preset import load_preset
from sheafsynth.engine.preset.load import factory_presets, parse_preset
from sheafsynth.host.commands.new import starting_document
from sheafsynth.host.pictures.draw import MODES_SHOWN, draw_instrument
from sheafsynth.host.pictures.modes import lowest_modes

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"      # PNG specification (ISO/IEC 15948), section 5.2
SVG_NS = "{http://www.w3.org/2000/svg}"


def _fields(preset):
    return [c.extra["field"] for c in sheaf_of(preset, 48000.0).cells if c.extra and "field" in c.extra]


def _cli(*args: str, pre: str = "") -> subprocess.CompletedProcess:
    code = f"{pre}import sys; from sheafsynth.host.cli import main; sys.exit(main(sys.argv[1:]))"
    return subprocess.run([sys.executable, "-c", code, *args], capture_output=True, text=True, timeout=300)


@pytest.mark.slow
@pytest.mark.parametrize("path", factory_presets(), ids=lambda p: p.stem)
def test_every_factory_preset_draws_a_png_of_the_expected_size(tmp_path, path):
    preset = load_preset(path)
    out = draw_instrument(preset, tmp_path / "pic.png")
    data = out.read_bytes()
    assert data[:8] == PNG_SIGNATURE and len(data) > 20_000
    img = mpimg.imread(out)                       # an independent PNG reader decodes it
    # the figure is 3.2 in a column (1 network row + one row a field) at 100 dpi
    rows_in = 4.2 + 3.0 * len(_fields(preset))
    assert img.shape[1] == round(3.2 * (1 + MODES_SHOWN) * 100)
    assert img.shape[0] == round(rows_in * 100)
    assert img[..., :3].std() > 0.05              # not a blank canvas
    assert sorted(x.name for x in tmp_path.iterdir()) == ["pic.png"]   # no temp file left


def test_the_svg_draws_every_vertex_of_every_field_complex(tmp_path):
    preset = load_preset([p for p in factory_presets() if p.stem == "curb-plate"][0])
    r = _cli("inspect", "curb-plate", "--plot", str(tmp_path / "plate.svg"))
    assert r.returncode == 0, r.stderr
    root = ET.parse(tmp_path / "plate.svg").getroot()          # well-formed XML
    assert root.tag == SVG_NS + "svg"
    fields = _fields(preset)
    assert fields
    for k, model in enumerate(fields):
        group = [g for g in root.iter(SVG_NS + "g") if g.get("id") == f"field{k}-vertices"]
        assert len(group) == 1
        dots = list(group[0].iter(SVG_NS + "use"))
        m, n = model.complex.shape                               # the torus grid as the preset gives it
        assert len(dots) == m * n == model.complex.n_vertices


def test_a_fixed_rim_square_membrane_mode_shapes_match_the_continuous_ones():
    # Rectangular membrane with a fixed rim: modes sin(m pi x) sin(n pi y), f_mn proportional to
    # sqrt(m^2 + n^2) for a square (Fletcher & Rossing, The Physics of Musical Instruments, 2nd ed., sec. 3.2).
    drum = parse_preset(starting_document("membrane", kind="drum"), "membrane")
    (model,) = _fields(drum)
    modes = lowest_modes(model, 4)
    xy = np.asarray(model.complex.coords)
    first = np.sin(np.pi * xy[:, 0]) * np.sin(np.pi * xy[:, 1])
    assert abs(np.corrcoef(modes[0].values, first)[0, 1]) > 0.99
    # modes 2 and 3 share a frequency: together they span sin(2 pi x) sin(pi y) and sin(pi x) sin(2 pi y)
    basis = np.column_stack([modes[1].values, modes[2].values])
    for ref in (np.sin(2 * np.pi * xy[:, 0]) * np.sin(np.pi * xy[:, 1]),
                np.sin(np.pi * xy[:, 0]) * np.sin(2 * np.pi * xy[:, 1])):
        fit = basis @ np.linalg.lstsq(basis, ref, rcond=None)[0]
        assert np.corrcoef(fit, ref)[0, 1] > 0.99
    assert modes[1].ratio == pytest.approx(np.sqrt(5 / 2), rel=0.01)
    assert modes[3].ratio == pytest.approx(np.sqrt(8 / 2), rel=0.01)


def test_a_free_bar_rings_at_the_free_free_beam_ratios():
    # Free-free Euler-Bernoulli bar: partials 1 : 2.756 : 5.404 (Fletcher & Rossing, sec. 2.15);
    # a path of 16 points is a coarse bar, so 3 %.
    bar = parse_preset(starting_document("bar", kind="bar"), "bar")
    (model,) = _fields(bar)
    modes = lowest_modes(model, 3)
    assert [m.ratio for m in modes[1:]] == pytest.approx([2.756, 5.404], rel=0.03)
    # the lowest free-free shape is symmetric with two nodes, its ends moving most (same source)
    v = modes[0].values
    assert np.allclose(v, v[::-1], atol=1e-6) or np.allclose(v, -v[::-1], atol=1e-6)
    assert np.count_nonzero(np.diff(np.sign(v))) == 2


def test_without_matplotlib_one_line_and_nothing_written(tmp_path):
    target = tmp_path / "pic.png"
    r = _cli("inspect", "porch-pluck", "--plot", str(target),
             pre="import sys; sys.modules['matplotlib'] = None; ")   # import matplotlib now fails
    assert r.returncode != 0
    assert r.stderr.count("\n") == 1 and "matplotlib" in r.stderr and "Traceback" not in r.stderr
    assert not target.exists() and list(tmp_path.iterdir()) == []


def test_an_unknown_picture_format_is_refused(tmp_path):
    r = _cli("inspect", "porch-pluck", "--plot", str(tmp_path / "pic.jpg"))
    assert r.returncode == 2 and "png" in r.stderr and r.stderr.count("\n") == 1
    assert list(tmp_path.iterdir()) == []


def test_an_existing_picture_is_replaced_whole(tmp_path):
    target = tmp_path / "pic.png"
    target.write_bytes(b"old")
    os.chmod(target, 0o640)
    r = _cli("inspect", "porch-pluck", "--plot", str(target))
    assert r.returncode == 0, r.stderr
    assert target.read_bytes()[:8] == PNG_SIGNATURE
    assert os.stat(target).st_mode & 0o777 == 0o640            # the file keeps its permissions
    assert sorted(x.name for x in tmp_path.iterdir()) == ["pic.png"]

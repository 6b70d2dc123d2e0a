"""The network sheaf of a preset, built once per preset object."""

from sheafsynth.engine.model.sheaf import sheaf_of
from sheafsynth.engine.preset import load_preset
from tests.engine.preset.test_preset import BASE


def test_sheaf_of_builds_once_per_preset_object():
    p = load_preset(BASE)
    assert sheaf_of(p) is sheaf_of(p)
    assert sheaf_of(load_preset(BASE)) is not sheaf_of(p)

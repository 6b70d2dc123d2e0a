"""Deep validation one layer above the preset: the network and lowering checks."""

import pytest

from sheafsynth.engine.errors import PresetError
from sheafsynth.engine.ir.validate import check_preset, load_checked
from sheafsynth.engine.preset import load_preset, save_preset
from tests.engine.preset.test_preset import mutate


def test_preset_layer_alone_leaves_network_checks_to_validate():
    """load_preset checks the document; the wiring is checked one layer up (load_checked)."""
    doc = mutate(lambda d: d["wires"].append({"from": "loop", "to": "nowhere"}))
    assert load_preset(doc).name == "test-string"
    with pytest.raises(PresetError) as info:
        load_checked(doc)
    assert str(info.value).startswith("wires[")


def test_save_with_network_check_refuses_a_bad_network(tmp_path):
    target = tmp_path / "mine.json"
    doc = mutate(lambda d: d["wires"].append({"from": "loop", "to": "nowhere"}))
    with pytest.raises(PresetError):
        save_preset(doc, target, check=check_preset)
    assert not target.exists()


def test_a_checked_preset_is_returned_as_is():
    p = load_preset(mutate(lambda d: None))
    assert check_preset(p) is p
    assert load_checked(p) is p

"""Every factory preset still sounds as recorded (tests/golden/hashes.json), and so
does every version 1 copy of them (tests/golden/v1/, hashes-v1.json, recorded
before format version 2: a version 1 file migrates on load as designed at
48 kHz and must render sample for sample as before).

On the machine and compiler the hashes were recorded with (kernels are built
with -march=native), every take must match sample for sample.  Elsewhere the
RMS envelope (2048-sample frames) must match within 1e-4 absolute: a
different vector unit may round differently, but not audibly.
"""

from __future__ import annotations

import json

import numpy as np
import pytest

from tests.golden.phrases import HASHES, HASHES_V1, machine, render_all, v1_presets

pytestmark = pytest.mark.slow

RECORDED = json.loads(HASHES.read_text())
RECORDED_V1 = json.loads(HASHES_V1.read_text())


@pytest.fixture(scope="module")
def takes():
    return render_all()


@pytest.fixture(scope="module")
def takes_v1():
    return render_all(v1_presets())


def _compare(recorded: dict, got_all: dict, name: str) -> None:
    for take, want in recorded["takes"][name].items():
        got = got_all[name][take]
        assert got["samples"] == want["samples"], f"{name} {take}: length changed"
        if machine() == recorded["machine"]:
            assert got["sha256"] == want["sha256"], f"{name} {take}: audio changed"
        np.testing.assert_allclose(got["rms"], want["rms"], atol=1e-4, err_msg=f"{name} {take}")


def test_every_factory_preset_is_recorded(takes):
    assert sorted(takes) == sorted(RECORDED["takes"]), "re-record: python -m tests.golden.phrases --record"


@pytest.mark.parametrize("name", sorted(RECORDED["takes"]))
def test_takes_sound_as_recorded(takes, name):
    _compare(RECORDED, takes, name)


def test_every_version1_copy_is_recorded(takes_v1):
    assert sorted(takes_v1) == sorted(RECORDED_V1["takes"])
    for path in v1_presets():
        assert json.loads(path.read_text())["version"] == 1, f"{path.name} must stay a version 1 file"


@pytest.mark.parametrize("name", sorted(RECORDED_V1["takes"]))
def test_version1_files_sound_as_before_version2(takes_v1, name):
    _compare(RECORDED_V1, takes_v1, name)

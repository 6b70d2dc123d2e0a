"""Every factory preset still sounds as recorded (tests/golden/hashes.json).

On the machine and compiler the hashes were recorded with (kernels are built
with -march=native), every take must match sample for sample.  Elsewhere the
RMS envelope (2048-sample frames) must match within 1e-4 absolute: a
different vector unit may round differently, but not audibly.
"""

from __future__ import annotations

import json

import numpy as np
import pytest

from tests.golden.phrases import HASHES, machine, render_all

pytestmark = pytest.mark.slow

RECORDED = json.loads(HASHES.read_text())


@pytest.fixture(scope="module")
def takes():
    return render_all()


def test_every_factory_preset_is_recorded(takes):
    assert sorted(takes) == sorted(RECORDED["takes"]), "re-record: python -m tests.golden.phrases --record"


@pytest.mark.parametrize("name", sorted(RECORDED["takes"]))
def test_takes_sound_as_recorded(takes, name):
    for take, want in RECORDED["takes"][name].items():
        got = takes[name][take]
        assert got["samples"] == want["samples"], f"{name} {take}: length changed"
        if machine() == RECORDED["machine"]:
            assert got["sha256"] == want["sha256"], f"{name} {take}: audio changed"
        np.testing.assert_allclose(got["rms"], want["rms"], atol=1e-4, err_msg=f"{name} {take}")

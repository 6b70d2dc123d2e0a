"""The assembled sparse system (third consumer) against the kernel (first)."""

from __future__ import annotations

import json

import numpy as np
import pytest
import scipy.sparse as sp

from sheafsynth.engine.analysis.assemble import assemble, impulse_response
from sheafsynth.engine.instrument import Instrument
from sheafsynth.engine.preset import factory_presets


def _string_presets():
    out = []
    for p in factory_presets():
        doc = json.loads(p.read_text())
        if not any(c["kind"] == "field" for c in doc["cells"]):
            out.append(p)
    return out


@pytest.mark.parametrize("path", _string_presets(), ids=lambda p: p.stem)
@pytest.mark.parametrize("note", [40, 69])
def test_impulse_response_matches_kernel(path, note):
    doc = json.loads(path.read_text())
    doc["excitation"] = {"kind": "impulse"}
    inst = Instrument(doc, rate=48000, max_block=512, limiter=False)
    inst.note_on(note, 127)
    y = inst.render(3000).astype(np.float64)
    sysm = assemble(inst.program, None, note)
    h = impulse_response(sysm, 3000)
    assert np.max(np.abs(y - h)) < 1e-5
    assert sp.issparse(sysm.A)
    # a delay line is a shift chain: about one nonzero per state, never a dense block
    assert sysm.A.nnz < 6 * sysm.n_states


def test_partition_covers_every_state():
    inst = Instrument(factory_presets()[0], rate=48000)
    sysm = assemble(inst.program, None, 60)
    idx = np.concatenate(list(sysm.partition.values()))
    assert sorted(idx.tolist()) == list(range(sysm.n_states))

"""Field cells end to end: lowering, C kernel, reference, assembly, presets.

External checks name their source beside the assertion.
"""

from __future__ import annotations

import json
import math
import re

import numpy as np
import pytest
import scipy.sparse.linalg as spla

from sheafsynth.engine.ir import voicing as V
from sheafsynth.engine.analysis.assemble import assemble
from sheafsynth.engine.model.cells.field_model import FieldModel
from sheafsynth.engine.backends.c.emit import generate
from sheafsynth.engine.errors import PresetError
from sheafsynth.engine.ir.fields import stencil_operators
from sheafsynth.engine.instrument import Instrument
from sheafsynth.engine.ir.lower import lower
from sheafsynth.engine.ir.program import note_hz
from sheafsynth.engine.locations import FACTORY_DIR
from sheafsynth.engine.ir.validate import load_checked
from sheafsynth.engine.model.sheaf import sheaf_of
from sheafsynth.engine.backends.reference.stepper import ReferenceStepper
from tests.measure import cents, decay_t60, fundamental

FS = 48000
FIELD_PRESETS = ["curb-plate", "alley-gong", "crate-bar", "bucket-drum", "bridge-trio"]


def doc(cell: dict, *, params=None, wires=None, cells=(), **top) -> dict:
    d = {"format": "sheafsynth-preset", "version": 1, "name": "field-test",
         "parameters": params or {}, "cells": [cell, *cells],
         "wires": wires or [{"from": "excite", "to": "f"}, {"from": "f", "to": "out"}],
         "excitation": {"kind": "impulse"}}
    d.update(top)
    return d


def field(**kw) -> dict:
    c = {"id": "f", "kind": "field"}
    c.update(kw)
    return c


def factory(name: str) -> dict:
    return json.loads((FACTORY_DIR / f"{name}.json").read_text())


def field_block(prog):
    return next(b for b in prog.blocks if b.is_field)


def distinct(values, rel=1e-4):
    out = []
    for v in values:
        if not out or abs(v - out[-1]) > rel * abs(out[-1]):
            out.append(v)
    return out


def angles_hz(A, k, sigma=1.0):
    ev = spla.eigs(A.tocsc(), k=k, sigma=sigma, return_eigenvectors=False)
    return np.sort(np.abs(np.angle(ev))) * FS / (2 * math.pi)


# --------------------------------------------------------------------------
# spectra

@pytest.mark.parametrize("m,n", [(6, 8), (5, 7), (8, 3)])
def test_compiled_torus_laplacian_spectrum(m, n):
    """The Laplacian the compiled stencil applies on a periodic M x N grid has
    eigenvalues 4 sin^2(pi j/M) + 4 sin^2(pi k/N) (standard result for
    circulant matrices); the assembled system's modes follow the leapfrog
    relation 4 sin^2(w/2) = lambda^2 mu (Bilbao 2009)."""
    lam = 0.4
    prog = lower(load_checked(doc(field(complex={"grid": [m, n], "wrap": "torus"}, speed=lam))))
    fp = field_block(prog).field
    assert fp.layout == "stencil"
    got = np.sort(np.linalg.eigvalsh(fp.operator_matrix().toarray()))
    j, k = np.meshgrid(np.arange(m), np.arange(n), indexing="ij")
    mu = np.sort((4 * np.sin(np.pi * j / m) ** 2 + 4 * np.sin(np.pi * k / n) ** 2).ravel())
    np.testing.assert_allclose(got, mu, atol=1e-10)   # circulant-matrix standard result
    z = np.linalg.eigvals(assemble(prog).A.toarray())
    w = np.sort(np.abs(np.angle(z)))[::2]              # conjugate pairs
    want = np.sort(2 * np.arcsin(np.sqrt(np.float32(lam) ** 2 * mu) / 2))
    np.testing.assert_allclose(w, want, atol=1e-6)     # Bilbao 2009 leapfrog dispersion


@pytest.mark.parametrize("lam", [0.3, 0.55, 0.7])
def test_leapfrog_dispersion_measured_from_audio(lam):
    """A 14 x 14 membrane with fixed rim, struck and heard at the centre: its
    lowest mode (L-eigenvalue mu = 8 sin^2(pi/26)) rings at w with
    4 sin^2(wT/2) = lambda^2 mu, within 0.5 cent (Bilbao 2009, FDTD wave
    equation).  At lambda = 0.7 the continuum value lambda sqrt(mu) is off by
    more than a cent, so the check sees the warping."""
    d = doc(field(complex={"grid": [14, 14]}, boundary="fixed", speed=lam, strike=[0.5, 0.5],
                  pickup=[0.5, 0.5]))
    inst = Instrument(d, rate=FS, strict=True, limiter=False)
    inst.note_on(60, 100)
    x = inst.render(FS)
    mu = 8 * math.sin(math.pi / 26) ** 2
    want = FS / math.pi * math.asin(lam * math.sqrt(mu) / 2)
    got = fundamental(x, FS, want)
    assert abs(cents(got, want)) < 0.5
    if lam == 0.7:
        assert abs(cents(FS * lam * math.sqrt(mu) / (2 * math.pi), want)) > 1.0


def test_square_membrane_mode_ratios_from_assembly():
    """bucket-drum (38 x 38 grid, fixed rim: 36 x 36 moving points): the first
    five distinct mode frequencies of the assembled system are in the ratios
    sqrt(m^2 + n^2)/sqrt(2) = 1, 1.581, 2.000, 2.236, 2.550 within 1 %
    (Fletcher & Rossing, The Physics of Musical Instruments)."""
    prog = lower(load_checked(FACTORY_DIR / "bucket-drum.json"), FS)
    assert field_block(prog).field.n_dof == 36 * 36
    hz = distinct(angles_hz(assemble(prog, pitch=48).A, 24))[:5]
    np.testing.assert_allclose(np.array(hz) / hz[0], [1, 1.581, 2.000, 2.236, 2.550], rtol=0.01)
    assert abs(cents(hz[0], note_hz(48))) < 0.05        # tuned: lowest mode at the note


def test_free_free_bar_mode_ratios_from_assembly():
    """Stiff path of 40 points, free ends, bending only: after the two rigid
    modes the assembled system's first four modes are in the ratios
    1, 2.756, 5.404, 8.933 within 2 % (Fletcher & Rossing; Euler-Bernoulli
    free-free bar)."""
    d = doc(field(complex={"path": 40}, boundary="free", dynamics="stiff", speed=0, stiffness=0.3,
                  strike=0.3, pickup=0.05))
    prog = lower(load_checked(d))
    z = np.linalg.eigvals(assemble(prog).A.toarray())
    hz = np.sort(np.abs(np.angle(z)))[::2] * FS / (2 * math.pi)
    assert np.sum(hz < 1e-3) == 2                      # translation and rotation (drift modes)
    ring = hz[hz >= 1e-3][:4]
    np.testing.assert_allclose(ring / ring[0], [1, 2.756, 5.404, 8.933], rtol=0.02)


def test_factory_bar_partials():
    """crate-bar (16 points) keeps the free-free bar's character: 1 : 2.74 : 5.29
    against 1 : 2.756 : 5.404 (Fletcher & Rossing) within 2.5 %, tuned to the note."""
    prog = lower(load_checked(FACTORY_DIR / "crate-bar.json"), FS)
    z = np.linalg.eigvals(assemble(prog, pitch=45).A.toarray())
    hz = np.sort(np.abs(np.angle(z)))[::2] * FS / (2 * math.pi)
    ring = hz[hz > 1.0][:3]
    np.testing.assert_allclose(ring / ring[0], [1, 2.756, 5.404], rtol=0.025)
    assert abs(cents(ring[0], note_hz(45))) < 0.05


def test_mobius_has_no_global_section_and_no_dc_mode():
    """Mobius strip with the sign seam, free boundary: H^0 = 0 and the assembled
    system has no mode at z = 1; the untwisted cylinder has H^0 = 1 and a drift
    mode at z = 1 (Hansen & Ghrist 2019: a twisted constant sheaf has no global
    section)."""
    for wrap, h0 in (("mobius", 0), ("cylinder", 1)):
        d = doc(field(complex={"grid": [6, 9], "wrap": wrap}, boundary="free", speed=0.5))
        preset = load_checked(d)
        model: FieldModel = sheaf_of(preset).cells[0].extra["field"]
        assert model.h0() == h0
        z = np.linalg.eigvals(assemble(lower(preset)).A.toarray())
        at_one = int(np.sum(np.abs(z - 1.0) < 1e-6))
        assert (at_one > 0) == (h0 > 0)


# --------------------------------------------------------------------------
# stability

def test_unstable_speed_refused_with_corner_named():
    """lambda^2 mu_max <= 4 is the leapfrog bound (Bilbao 2009); a 2-D grid has
    mu_max close to 8, so lambda = 0.75 at the top of the knob is refused."""
    params = {"tension": {"value": 0.6, "min": 0.5, "max": 0.75}}
    d = doc(field(complex={"grid": [16, 16], "wrap": "torus"}, speed="tension"), params=params)
    with pytest.raises(PresetError) as e:
        load_checked(d)
    msg = str(e.value)
    assert msg.startswith("cells[0].speed: unstable at tension=0.75:")
    assert re.search(r"lambda\^2 mu_max = 4\.5 > 4", msg)
    params["tension"]["max"] = 0.7
    load_checked(d)                                     # 0.49 * 8 = 3.92: accepted


def test_unstable_stiffness_and_loss_refused():
    d = doc(field(complex={"path": 20}, dynamics="stiff", speed=0.1, stiffness="stiff"),
            params={"stiff": {"value": 0.3, "min": 0.1, "max": 0.6}})
    with pytest.raises(PresetError, match=r"^cells\[0\]\.stiffness: unstable at stiff=0\.6"):
        load_checked(d)
    d = doc(field(complex={"path": 20}, speed=0.5, loss="damp"),
            params={"damp": {"value": 0.001, "min": -0.001, "max": 0.01}})
    with pytest.raises(PresetError, match=r"^cells\[0\]\.loss: loss -0\.001 < 0 is a gain"):
        load_checked(d)


def test_tuned_field_refused_at_the_highest_note():
    """A tuned drum whose top note would push lambda^2 mu_max past 4 names the note."""
    d = factory("bucket-drum")
    d["notes"] = [36, 96]
    with pytest.raises(PresetError, match=r"^cells\[1\]\.speed: unstable at note 98 \(highest playable 96"):
        load_checked(d)


# --------------------------------------------------------------------------
# kernel against the reference

def _kernel_vs_reference(d, events, seconds=0.5, block=256):
    inst = Instrument(d, rate=FS, max_block=block, seed=3, strict=True)
    ref = ReferenceStepper(inst.program, seed=3)
    worst, peak = 0.0, 0.0
    for k in range(int(seconds * FS) // block):
        evs = events.get(k, [])
        for e in evs:
            inst.push_event(*e)
        out = inst.process(block).copy()
        want = ref.render(evs, block)
        worst = max(worst, float(np.max(np.abs(out - want))))
        peak = max(peak, float(np.max(np.abs(want))))
    return worst, peak


@pytest.mark.parametrize("name", FIELD_PRESETS)
def test_kernel_equals_reference_on_field_presets(name):
    """Two notes, the last knob swept across its range (pickup, beater,
    mallet, orbit...), a release: C within 1e-5 of the reference."""
    d = factory(name)
    last = len(d["parameters"]) - 1
    lo = min(d["notes"][1], 60)
    evs = {0: [(0, V.EV_NOTE_ON, lo, 110, 0.0)], 10: [(50, V.EV_NOTE_ON, lo - 7, 70, 0.0)],
           20: [(3, V.EV_PARAM, last, 0, 1e9)], 50: [(9, V.EV_PARAM, last, 0, -1e9)],
           70: [(0, V.EV_NOTE_OFF, lo, 0, 0.0)]}
    worst, peak = _kernel_vs_reference(d, evs)
    assert peak > 1e-3
    assert worst <= 1e-5, f"{name}: max |C - reference| = {worst:.3g}"


def test_csr_layout_with_rotation_twist_and_moving_pickup():
    """stalk 2 ring with a 60 degree rotation on the seam (CSR layout) and a
    pickup a knob moves round the ring, plus a direction vector."""
    d = doc(field(complex={"path": 11, "wrap": "ring"}, stalk=2, twist={"seam": {"rotate": 60}},
                  speed=0.6, loss=0.0005, hf_loss=0.001, strike={"at": 0.2, "direction": [1, 0.5]},
                  pickup={"at": "pk", "direction": [0.3, 1]}),
            params={"pk": {"value": 0.1, "min": 0.0, "max": 1.0}},
            wires=[{"from": "excite", "to": "f"}, {"from": "f", "to": "out", "gain": 0.5}])
    assert field_block(lower(load_checked(d))).field.layout == "csr"
    evs = {0: [(0, V.EV_NOTE_ON, 60, 100, 0.0)], 5: [(0, V.EV_PARAM, 0, 0, 0.95)], 40: [(0, V.EV_NOTE_OFF, 60, 0, 0.0)]}
    worst, peak = _kernel_vs_reference(d, evs, seconds=0.25)
    assert peak > 1e-3 and worst <= 1e-5


def test_stencil_operators_equal_the_sheaf_operators():
    """Internal consistency: for every wrap / boundary / seam sign the stencil's
    ghost rules reproduce the sheaf Laplacian and bending operator exactly."""
    cases = [({"grid": [6, 7], "wrap": w}, b, t) for w in ("none", "torus", "cylinder", "mobius")
             for b in ("fixed", "free") for t in (None, {"seam": -1})
             if not (w == "none" and t)]
    cases += [({"path": 9, "wrap": w}, b, t) for w in ("none", "ring") for b in ("fixed", "free")
              for t in (None, {"seam": -1}) if not (w == "none" and t)]
    for cx, boundary, twist in cases:
        spec = field(complex=cx, boundary=boundary, dynamics="stiff", speed=0.1, stiffness=0.05)
        if twist:
            spec["twist"] = twist
        prog = lower(load_checked(doc(spec)))
        fp = field_block(prog).field
        assert fp.layout == "stencil", (cx, boundary, twist)
        lap, stiff = stencil_operators(fp.stencil)
        np.testing.assert_allclose(lap.toarray(), fp.L.toarray(), atol=1e-12)
        np.testing.assert_allclose(stiff.toarray(), fp.S.toarray(), atol=1e-12)


# --------------------------------------------------------------------------
# points, pitch, release, coupling

def test_pickup_moved_by_a_parameter_changes_only_the_output_weights():
    d = factory("curb-plate")
    inst = Instrument(d, rate=FS, strict=True, limiter=False)
    fp = field_block(inst.program).field
    env = {p.name: p.value for p in inst.program.params}
    a = fp.weights(fp.outputs[0], dict(env, pickup=0.2))
    b = fp.weights(fp.outputs[0], dict(env, pickup=0.8))
    assert np.isclose(a.sum(), 1.0) and np.isclose(b.sum(), 1.0) and np.abs(a - b).max() > 0.1
    sys_a = assemble(inst.program, {"pickup": 0.2}, pitch=60)
    sys_b = assemble(inst.program, {"pickup": 0.8}, pitch=60)
    plate = sys_a.partition["plate"]
    diff = (sys_a.A - sys_b.A).tocsr()[plate][:, plate]
    assert diff.nnz == 0 or abs(diff).max() == 0.0      # the field's own update is untouched
    outs = []
    for pos in (0.2, 0.8):
        inst.set_now("pickup", pos)
        inst.all_sound_off()
        inst.render(512)
        inst.note_on(60, 100)
        outs.append(inst.render(9600))
    assert np.abs(outs[0] - outs[1]).max() > 0.05 * np.abs(outs[0]).max()


@pytest.mark.parametrize("name,notes", [("bucket-drum", (36, 50, 70)), ("curb-plate", (40, 60, 78)),
                                        ("crate-bar", (33, 48, 62))])
def test_tuned_fields_ring_at_the_played_note(name, notes):
    """Pitch maps to the field: f = 440 * 2^((n - 69)/12) (MIDI 1.0 numbering,
    ISO 16 A4); the lowest mode, measured from the kernel's audio, is within
    0.5 cent of it."""
    inst = Instrument(load_checked(FACTORY_DIR / f"{name}.json"), rate=FS, strict=True, limiter=False)
    for note in notes:
        inst.all_sound_off()
        inst.render(512)
        inst.note_on(note, 100)
        x = inst.render(FS)
        got = fundamental(x[FS // 5:], FS, note_hz(note))
        assert abs(cents(got, note_hz(note))) < 0.5, (name, note, got)


def test_release_damps_every_mode_by_decay_per_period():
    """After note-off a lossless tuned field decays by release.decay per period
    of the note: T60 = -3 / (f0 log10 decay) (definition of T60, common
    practice), within 3 %."""
    d = doc(field(complex={"grid": [10, 10]}, boundary="fixed", speed=0.5, strike=[0.5, 0.5],
                  pickup=[0.5, 0.5], tune="pitch"), release={"decay": 0.99}, notes=[48, 72])
    inst = Instrument(d, rate=FS, strict=True, limiter=False)
    inst.note_on(60, 100)
    inst.render(4800)
    inst.note_off(60)
    x = inst.render(FS)
    f0 = note_hz(60)
    want = -3.0 / (f0 * math.log10(0.99))
    got = decay_t60(x[2400:], FS, f0)
    assert got == pytest.approx(want, rel=0.03)


def test_bridge_rings_sympathetic_strings():
    """bridge-trio: only string1 is plucked; string2 sounds through the bridge,
    and not at all without coupling."""
    d = factory("bridge-trio")
    d["wires"] = [w for w in d["wires"] if w["to"] != "out"] + [{"from": "string2", "to": "out"}]
    levels = []
    for coupling in (0.0, 0.01):
        d["parameters"]["coupling"]["value"] = coupling
        inst = Instrument(d, rate=FS, strict=True, limiter=False)
        inst.note_on(48, 100)
        levels.append(float(np.abs(inst.render(FS)).max()))
    assert levels[0] == 0.0 and levels[1] > 1e-3


def test_bridge_is_stable_over_its_knob_box():
    """The assembled bridge-trio has spectral radius below 1 at every corner of
    its parameter box (frozen check; the coupling is one-way, a cascade)."""
    preset = load_checked(FACTORY_DIR / "bridge-trio.json")
    prog = lower(preset, FS)
    names = list(preset.parameters)
    import itertools
    for combo in itertools.product(*[(preset.parameters[n].lo, preset.parameters[n].hi) for n in names]):
        A = assemble(prog, dict(zip(names, combo)), pitch=72).A.toarray()
        assert max(abs(np.linalg.eigvals(A))) < 1.0


# --------------------------------------------------------------------------
# consistency, ports, bad input, generated code

TRIANGLES = {"vertices": 4, "edges": [[0, 1], [1, 2], [2, 0], [1, 3], [3, 2]], "faces": [[0, 1, 2], [1, 4, 3]]}


def test_explicit_inconsistent_faces_refused_or_reported():
    """A 45 degree rotation on one edge of a face: the composition of
    restriction maps round the face is that rotation (Hansen & Ghrist 2019),
    refused by default, accepted and reported with "report"."""
    spec = field(complex=TRIANGLES, stalk=2, twist={"edges": [0], "rotate": 45}, speed=0.5,
                 strike={"vertex": 0}, pickup={"vertex": 3})
    with pytest.raises(PresetError, match=r"^cells\[0\]\.consistency: .*face 0"):
        load_checked(doc(spec))
    spec["consistency"] = "report"
    preset = load_checked(doc(spec))
    model: FieldModel = sheaf_of(preset).cells[0].extra["field"]
    report = model.summary()
    assert len(report["inconsistent_faces"]) == 1 and "face 0" in report["inconsistent_faces"][0]
    maps = sheaf_of(preset).restriction_maps()
    assert any(m.get("map") == "holonomy" for m in maps)
    prog = lower(preset)
    assert field_block(prog).field.layout == "csr"
    worst, peak = _kernel_vs_reference(doc(spec), {0: [(0, V.EV_NOTE_ON, 60, 100, 0.0)]}, seconds=0.1)
    assert peak > 1e-4 and worst <= 1e-5


def test_at_wires_make_ports():
    d = factory("bridge-trio")
    preset = load_checked(d)
    bridge = sheaf_of(preset).cells[sheaf_of(preset).index["bridge"]]
    assert (bridge.n_in, bridge.n_out) == (2, 3)       # strike + one "at" input; pickup + two "at" outputs


@pytest.mark.parametrize("mutate,path,words", [
    (lambda d: d["wires"].append({"from": "excite", "to": "out", "at": 0.5}), "wires[2].at", "neither end"),
    (lambda d: d["wires"].append({"from": "excite", "to": "f.0", "at": 0.5}), "wires[2].to", "not both"),
    (lambda d: d["cells"][0].update(pickup={"vertex": 0}), "cells[0].pickup.vertex", "fixed rim"),
    (lambda d: d["cells"][0].update(pickup=[0.5, 1.2]), "cells[0].pickup[1]", "[0, 1]"),
    (lambda d: d["cells"][0].update(pickup=[0.5]), "cells[0].pickup", "2 fraction"),
    (lambda d: d["cells"][0].update(strike=[0.5, {"param": "pk", "scale": 2.0}]), "cells[0].strike[1]", "reaches 2"),
    (lambda d: d["cells"][0].update(speed="tensoin"), "cells[0].speed", "unknown parameter"),
    (lambda d: d["cells"][0].update(stiffness=0.1), "cells[0].stiffness", "stiff"),
    (lambda d: d["cells"][0].update(dynamics="diffusion", tune="pitch"), "cells[0].tune", "diffusion"),
    (lambda d: d["cells"][0].update(tune={"ratio": -1}), "cells[0].tune.ratio", "ratio"),
    (lambda d: d["cells"][0].update(complex={"grid": [2, 2]}), "cells[0].boundary", "no state"),
    (lambda d: d["cells"][0].update(dynamics="wobble"), "cells[0].dynamics", "wobble"),
    (lambda d: d["cells"][0].update(complex=TRIANGLES, boundary="free"), "cells[0]", "explicit"),
])
def test_bad_field_input_names_the_path(mutate, path, words):
    d = doc(field(complex={"grid": [8, 8]}, boundary="fixed", speed=0.5),
            params={"pk": {"value": 0.5, "min": 0.0, "max": 1.0}})
    mutate(d)
    with pytest.raises(PresetError) as e:
        load_checked(d)
    assert e.value.path.startswith(path), str(e.value)
    assert words in str(e.value)


def test_generated_code_has_no_preset_text_and_prefixed_symbols():
    d = factory("alley-gong")
    d["cells"][0]["id"] = "zzgongzz"
    d["wires"] = [{k: (v.replace("gong", "zzgongzz") if isinstance(v, str) else v) for k, v in w.items()}
                  for w in d["wires"]]
    src = generate(lower(load_checked(d)))
    assert "zzgongzz" not in src and d["about"][:20] not in src
    for name in re.findall(r"^static\s+(?:const\s+)?[a-z0-9_]+\s+\**([A-Za-z_][A-Za-z0-9_]*)\s*[\[(=]", src, re.M):
        assert name.startswith(("ssk_", "ss_")), name

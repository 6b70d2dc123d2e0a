"""``sheafsynth check``: stability verdicts, certificates, modes against audio."""

from __future__ import annotations

import json
import math

import jsonschema
import numpy as np
import pytest

from sheafsynth.engine.analysis.report import check, guard, ramp_limits
from sheafsynth.engine.instrument import Instrument
from sheafsynth.engine.locations import ENGINE_DIR, FACTORY_DIR
from sheafsynth.engine.preset import factory_presets, load_preset
from sheafsynth.engine.errors import UnstableError
from tests.measure import cents, decay_t60, fundamental

SCHEMA = json.loads((ENGINE_DIR / "analysis" / "schema" / "check-report.json").read_text())


def loop_preset(gain_max: float, n: int = 40) -> dict:
    """A delay fed back through a knob-controlled gain (the simplest loop)."""
    return {"format": "sheafsynth-preset", "version": 1, "name": "gain-loop", "polyphony": 2,
            "parameters": {"g": {"value": 0.9, "min": 0.5, "max": gain_max}},
            "cells": [{"id": "line", "kind": "delay", "length": n}],
            "wires": [{"from": "excite", "to": "line"}, {"from": "line", "to": "line", "gain": "g"},
                      {"from": "line", "to": "out", "gain": 0.3}],
            "excitation": {"kind": "impulse"},
            "controls": [{"cc": 1, "parameter": "g"}]}


def test_gain_above_one_at_a_corner_is_unstable_and_named():
    r = check(load_preset(loop_preset(1.05)), use_cache=False)
    assert r["stable"] is False and r["frozen"] == "unstable"
    assert r["worst_corner"]["values"] == {"g": 1.05}
    # a loop of gain G per N samples has radius G^(1/N) (eigenvalues of a cyclic shift)
    assert r["spectral_radius_max"] == pytest.approx(1.05 ** (1 / 40), rel=1e-9)
    assert r["certified"] is False and "g=1.05" in r["failing"]


def test_render_refuses_an_unstable_preset_unless_allowed():
    p = load_preset(loop_preset(1.05))
    with pytest.raises(UnstableError) as info:
        guard(p)
    assert "g=1.05" in str(info.value) and "--allow-unstable" in str(info.value)
    assert guard(p, allow_unstable=True)[0].startswith("playing an unstable preset")


def test_lossless_corner_is_not_strictly_stable():
    r = check(load_preset(loop_preset(1.0)), use_cache=False)
    assert r["frozen"] == "marginal" and r["stable"] is False


def test_gain_loop_below_one_is_certified_any_speed():
    r = check(load_preset(loop_preset(0.99)), use_cache=False)
    assert r["stable"] and r["certified"] == "any-speed"


def switching_preset() -> dict:
    """A 2-state cell moving between two Schur-stable matrices whose product has ρ > 1.

    A(θ) = (1-θ) A1 + θ A2 with A1 = [[.2, 1.5], [0, .2]], A2 = [[.2, 0], [1.5, .2]]:
    every frozen A(θ) has eigenvalues 0.2 ± 1.5 sqrt(θ(1-θ)) (|.| ≤ 0.95), yet
    alternating A1, A2 every sample grows since ρ(A1 A2) > 1 (constructed for
    this test; the phenomenon is the classic one of switched linear systems).
    """
    return {"format": "sheafsynth-preset", "version": 1, "name": "switcher", "polyphony": 1,
            "parameters": {"th": {"value": 0.5, "min": 0.0, "max": 1.0}},
            "cells": [{"id": "sw", "kind": "statespace",
                       "A": [[0.2, {"param": "th", "scale": -1.5, "offset": 1.5}],
                             [{"param": "th", "scale": 1.5}, 0.2]],
                       "B": [[1], [0]], "C": [[0, 1]], "D": [[0]]}],
            "wires": [{"from": "excite", "to": "sw"}, {"from": "sw", "to": "out"}],
            "excitation": {"kind": "impulse"},
            "controls": [{"cc": 1, "parameter": "th"}]}


def test_fast_switching_counterexample_is_not_certified_for_fast_motion():
    A1 = np.array([[0.2, 1.5], [0.0, 0.2]])
    A2 = np.array([[0.2, 0.0], [1.5, 0.2]])
    assert max(abs(np.linalg.eigvals(A1 @ A2))) > 1.0           # switching every sample diverges
    r = check(load_preset(switching_preset()), use_cache=False)
    assert r["stable"] is True                                   # frozen-stable at every corner
    assert r["certified"] != "any-speed"
    if r["certified"] == "ramp-limited":
        # the proven slope is far below the full-range jump per sample that diverges
        assert r["slope_per_s"]["th"] / r["rate"] < 1.0


def test_ramp_limited_certificate_sets_the_kernel_ramp():
    preset = load_preset(FACTORY_DIR / "lantern-harp.json")
    r = check(preset)
    assert r["certified"] == "ramp-limited"
    limits = ramp_limits(preset)
    inst = Instrument(preset, min_ramp_s=limits)
    tone = inst.program.params[inst.param_index("tone")]
    assert tone.slope_per_s <= r["slope_per_s"]["tone"] * (1 + 1e-9)


def test_ramp_limited_bound_holds_in_simulation():
    """Brute force: the tone filter under the fastest allowed ramp never gains energy in the loop."""
    preset = load_preset(FACTORY_DIR / "lantern-harp.json")
    r = check(preset)
    slope = r["slope_per_s"]["tone"] / r["rate"]          # units per sample
    rng = np.random.default_rng(1)
    # loop of the delay (gain 1), decay at its max, tone filter, lossless allpass
    n = 50
    ring = rng.standard_normal(n)
    x1 = 0.0
    t = 0.3
    energy0 = float(np.sum(ring ** 2))
    for k in range(20000):
        t = float(np.clip(t + rng.choice([-slope, slope]), 0.05, 0.5))
        x = ring[k % n] * 0.9995
        y = (1 - t) * x + t * x1
        x1 = x
        ring[k % n] = y
    assert float(np.sum(ring ** 2)) < energy0


@pytest.mark.parametrize("path", factory_presets(), ids=lambda p: p.stem)
def test_check_every_factory_preset_is_certified_and_well_formed(path):
    r = check(load_preset(path))
    jsonschema.validate(json.loads(json.dumps(r, default=float)), SCHEMA)
    assert r["stable"], r.get("failing")
    assert r["certified"] in ("any-speed", "ramp-limited"), r.get("failing")


@pytest.mark.parametrize("name,note", [("porch-pluck", 57), ("cedar-box", 45)])
def test_reported_modes_match_rendered_audio(name, note):
    """Mode frequencies within 1 cent of the rendered peaks; T60 within 10 %.

    The report lists the partials heard, short ones included (cedar-box's
    body rings 0.2 s); a peak and a decay are measured from 0.1 s to 3 s, so
    the first three listed that ring longer than 1 s are compared."""
    preset = load_preset(FACTORY_DIR / f"{name}.json")
    r = check(preset, notes=[note])
    inst = Instrument(preset, limiter=False)
    inst.note_on(note, 100)
    x = inst.render(48000 * 3).astype(np.float64)
    checked = 0
    for m in [m for m in r["modes"] if m["t60_s"] is None or m["t60_s"] > 1.0][:3]:
        f = fundamental(x[4800:], 48000, m["freq_hz"])
        assert abs(cents(f, m["freq_hz"])) < 1.0, (m, f)
        if m["t60_s"] and m["t60_s"] < 30:
            got = decay_t60(x[9600:], 48000, m["freq_hz"], frame_s=0.1)
            assert abs(got - m["t60_s"]) / m["t60_s"] < 0.10, (m, got)
            checked += 1
    assert checked >= 2


def test_drift_mode_is_named():
    """An integrator (eigenvalue exactly 1) is reported as DC drift."""
    doc = {"format": "sheafsynth-preset", "version": 1, "name": "drifter", "polyphony": 1,
           "cells": [{"id": "acc", "kind": "statespace", "A": [[1]], "B": [[1]], "C": [[1]], "D": [[0]]}],
           "wires": [{"from": "excite", "to": "acc"}, {"from": "acc", "to": "out"}],
           "excitation": {"kind": "impulse"}}
    r = check(load_preset(doc), use_cache=False)
    assert r["drift_modes"] and "acc" in json.dumps(r["drift_modes"])
    assert r["frozen"] == "drift" and any("DC drift" in w for w in r["warnings"])


def test_check_cli_exit_codes(tmp_path, capsys):
    from sheafsynth.host.cli import main

    f = tmp_path / "bad.json"
    f.write_text(json.dumps(loop_preset(1.05)))
    assert main(["check", str(f)]) == 1
    assert "UNSTABLE" in capsys.readouterr().out
    assert main(["check", "porch-pluck", "--json"]) == 0
    report = json.loads(capsys.readouterr().out)
    jsonschema.validate(report, SCHEMA)
    assert main(["check", "porch-pluck", "--notes", "60,x"]) == 2
    assert main(["render", str(f), "--out", str(tmp_path / "x.wav")]) == 2
    assert "refusing" in capsys.readouterr().err
    png = tmp_path / "p.png"
    assert main(["check", "porch-pluck", "--plot", str(png)]) == 0
    assert png.stat().st_size > 10000
    assert not math.isnan(report["spectral_radius_max"])

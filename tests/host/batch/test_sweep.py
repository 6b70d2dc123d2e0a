"""``sheafsynth sweep``: an 11 x 11 grid over a string's loop gain and loop filter.

lantern-harp's loop (its "about": a bright string whose loop filter tilts
on one knob) is a pitch delay, a two-tap average y[n] = (1 - tone) x[n] +
tone x[n-1], a unit-gain tuning allpass and the gain ``decay`` per pass.
A delay loop is stable when its loop gain stays below 1 at every
frequency and grows when it passes 1 (Karplus & Strong 1983; Jaffe & Smith
1983): the loop gain here is decay * max over w of |H(e^jw)|, computed with
scipy.signal.freqz.  The grid leaves the declared ranges (--beyond-range)
on both axes so that both knobs push the loop gain past 1: decay above 1,
and tone below 0, where the average turns into a high-shelf with gain
|1 - 2 tone| > 1 at Nyquist.
"""

from __future__ import annotations

import csv
import math

import numpy as np
import pytest
import scipy.signal

from sheafsynth.engine.analysis.report import check
from sheafsynth.engine.preset.load import factory_presets, load_preset
from sheafsynth.host import cli
from sheafsynth.host.batch.sweep import point_preset

pytestmark = pytest.mark.slow

PRESET = "lantern-harp"
GRID = ["--param", "decay=0.9725..1.0225:11", "--param", "tone=-0.1..0.4:11"]
NOTE = 60


def _preset():
    p = load_preset(next(f for f in factory_presets() if f.stem == PRESET))
    assert {"decay", "tone"} <= set(p.parameters), "this test needs lantern-harp's decay and tone knobs"
    return p


def _loop_gain(decay: float, tone: float) -> float:
    _, h = scipy.signal.freqz([1.0 - tone, tone], [1.0], worN=4097)
    return decay * float(np.max(np.abs(h)))


def _rows(path) -> list[dict]:
    with open(path, newline="") as f:
        return list(csv.DictReader(f))


@pytest.fixture(scope="module")
def swept(tmp_path_factory):
    out = tmp_path_factory.mktemp("sweep")
    rc = cli.main(["sweep", PRESET, *GRID, "--notes", str(NOTE), "--stability-only", "--beyond-range",
                   "--workers", "2", "--out", str(out)])
    assert rc == 0
    return out


def test_unstable_cells_are_where_the_loop_gain_passes_1(swept):
    rows = _rows(swept / "sweep.csv")
    assert len(rows) == 121
    assert len({(r["decay"], r["tone"]) for r in rows}) == 121
    unstable = 0
    for r in rows:
        g = _loop_gain(float(r["decay"]), float(r["tone"]))
        assert abs(g - 1.0) > 1e-3        # the grid stays clear of gain 1 itself
        assert (r["stable"] == "True") == (g < 1.0), r
        unstable += r["stable"] == "False"
        # growth rate agrees in sign with the verdict (dB/s = 20 log10(radius) x rate)
        assert (float(r["decay_db_per_s"]) < 0) == (r["stable"] == "True")
    assert 0 < unstable < 121
    assert (swept / "heat-map.png").stat().st_size > 0


def test_sampled_cells_match_the_check_run_one_by_one(swept):
    rows = {(round(float(r["decay"]), 6), round(float(r["tone"]), 6)): r for r in _rows(swept / "sweep.csv")}
    preset = _preset()
    # two stable cells, one unstable by decay > 1, one by tone < 0 (high-shelf loop filter)
    for decay, tone in ((0.9725, 0.25), (0.9975, 0.4), (1.0125, 0.2), (0.9875, -0.1)):
        row = rows[(decay, tone)]
        rep = check(point_preset(preset, {"decay": decay, "tone": tone}), [NOTE], 48000.0, use_cache=False)
        assert (row["stable"] == "True") == rep["stable"]
        assert row["frozen"] == rep["frozen"]
        assert float(row["spectral_radius"]) == pytest.approx(rep["spectral_radius_max"], rel=1e-12)


def test_full_check_gives_fundamental_and_t60(tmp_path):
    """Two points of the full check: the fundamental is the note's (MIDI Tuning Standard, within 0.5 cent)
    and its T60 follows the loop's loss per period: T60 = 60 dB / (-20 log10 |decay H(e^jw0)|) periods
    (Jaffe & Smith 1983)."""
    rc = cli.main(["sweep", PRESET, "--param", "decay=0.99..0.999:2", "--set", "tone=0.3", "--notes", str(NOTE),
                   "--workers", "2", "--out", str(tmp_path)])
    assert rc == 0
    rows = _rows(tmp_path / "sweep.csv")
    f0 = 440.0 * 2 ** ((NOTE - 69) / 12)
    for r in rows:
        assert r["stable"] == "True" and r["certified"] in ("any-speed", "ramp-limited")
        hz = float(r["fundamental_hz"])
        assert abs(1200 * math.log2(hz / f0)) < 0.5
        w0 = 2 * math.pi * hz / 48000.0
        _, h = scipy.signal.freqz([0.7, 0.3], [1.0], worN=[w0])
        per_period = -20 * math.log10(float(r["decay"]) * abs(h[0]))
        assert float(r["t60_s"]) == pytest.approx(60.0 / per_period / hz, rel=0.02)
    assert float(rows[1]["t60_s"]) > float(rows[0]["t60_s"])


@pytest.mark.parametrize("extra, words", [
    (["--param", "decay=0.98..1.01:5"], "outside its declared range"),
    (["--param", "decay=0.98-0.99:5"], "expected NAME=LO..HI:N"),
    (["--param", "nope=0..1:3"], "has no parameter 'nope'"),
    (["--param", "decay=0.98..0.99:1"], "N must be 2"),
    (["--param", "decay=0.98..0.99:3", "--param", "decay=0.98..0.99:3"], "two different parameters"),
])
def test_bad_sweep_input_gets_one_line_and_status_2(extra, words, tmp_path, capsys):
    rc = cli.main(["sweep", PRESET, *extra, "--out", str(tmp_path / "x")])
    err = capsys.readouterr().err
    assert rc == 2 and words in err and len(err.strip().splitlines()) == 1

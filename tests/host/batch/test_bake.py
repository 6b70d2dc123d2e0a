"""``sheafsynth bake``: the same audio whatever the worker count, map.json, tuning, loudness, reruns, faults.

The cheapest string preset (porch-pluck: one delay loop), short takes.
"""

from __future__ import annotations

import json
import os
import resource
import signal
import socket
import subprocess
import sys
import threading
import time
from pathlib import Path

import numpy as np
import pyloudnorm
import pytest
import soundfile as sf

from sheafsynth.engine.analysis.report import guard
from sheafsynth.engine.preset.load import factory_presets, load_preset
from sheafsynth.host import bank, cli
from sheafsynth.host.commands import bake as bake_command
from sheafsynth.host.batch.bakeset import MAP_NAME, samples_sha256, validate_map
from sheafsynth.host.batch.takes import Take, TakeSettings, render_take

PRESET = "porch-pluck"
NOTES = "48,60,67"
ARGS = ["--notes", NOTES, "--velocities", "40,110", "--rounds", "2", "--seconds-max", "1.5"]
N_TAKES = 3 * 2 * 2

pytestmark = pytest.mark.slow


def _bake(out: Path, *extra: str) -> int:
    return cli.main(["bake", PRESET, "--out", str(out), *ARGS, *extra])


@pytest.fixture(scope="module")
def baked(tmp_path_factory):
    """The same set baked with one worker and with two."""
    one, two = tmp_path_factory.mktemp("one"), tmp_path_factory.mktemp("two")
    assert _bake(one, "--workers", "1") == 0
    assert _bake(two, "--workers", "2") == 0
    return one, two


def _map(folder: Path) -> dict:
    return json.loads((folder / MAP_NAME).read_text())


def test_one_and_two_workers_give_the_same_audio(baked):
    one, two = baked
    m1, m2 = _map(one), _map(two)
    assert len(m1["takes"]) == len(m2["takes"]) == N_TAKES
    for a, b in zip(m1["takes"], m2["takes"]):
        assert a["file"] == b["file"]
        # sha256 recomputed here from each file's samples, not only read from the maps
        h1, h2 = samples_sha256(one / a["file"]), samples_sha256(two / b["file"])
        assert h1 == h2 == a["sha256"] == b["sha256"], a["file"]
        x1, _ = sf.read(str(one / a["file"]), dtype="float32")
        x2, _ = sf.read(str(two / b["file"]), dtype="float32")
        assert np.array_equal(x1, x2)
    # round robins differ (each has its own seed), so "the same" above is not trivially true
    by = {(t["note"], t["velocity"], t["round"]): t["sha256"] for t in m1["takes"]}
    assert all(by[(n, v, 0)] != by[(n, v, 1)] for (n, v, r) in by if r == 0)


def test_map_lists_every_take_and_follows_its_schema(baked):
    one, _ = baked
    doc = _map(one)
    validate_map(doc)      # JSON Schema (jsonschema library) shipped in the package
    want = {(n, v, r) for n in (48, 60, 67) for v in (40, 110) for r in (0, 1)}
    assert {(t["note"], t["velocity"], t["round"]) for t in doc["takes"]} == want
    listed = {t["file"] for t in doc["takes"]}
    assert listed == {p.name for p in one.glob("*.wav")}
    for t in doc["takes"]:
        info = sf.info(str(one / t["file"]))
        assert info.samplerate == 48000 and info.channels == 1
        assert t["seconds"] == pytest.approx(info.frames / 48000)
        assert 0 < t["seconds"] <= 1.5
        x, _ = sf.read(str(one / t["file"]), dtype="float64")
        assert t["peak"] == pytest.approx(20 * np.log10(np.max(np.abs(x))), abs=1e-3)
        # trimmed: both ends at or above -90 dBFS (the silence threshold), 24-bit quantization aside
        assert abs(x[0]) >= 10 ** (-90 / 20) * 0.99 and abs(x[-1]) >= 10 ** (-90 / 20) * 0.99
        # loudness as pyloudnorm (ITU-R BS.1770) measures the file
        ref = pyloudnorm.Meter(48000).integrated_loudness(x)
        assert t["loudness"] == pytest.approx(ref, abs=0.01)
    assert (one / "contact-sheet.png").stat().st_size > 0


def _fundamental_hz(x: np.ndarray, rate: float, near_hz: float) -> float:
    """Fundamental by a long FFT: Hann window, zero padding to 2^21 points, and quadratic interpolation of
    the log-magnitude peak (J. O. Smith, Spectral Audio Signal Processing, "Quadratic Interpolation of
    Spectral Peaks"), searched within a semitone of ``near_hz``."""
    n = 1 << 21
    spec = np.abs(np.fft.rfft(x * np.hanning(len(x)), n))
    f = np.fft.rfftfreq(n, 1.0 / rate)
    band = np.flatnonzero((f > near_hz * 2 ** (-1 / 12)) & (f < near_hz * 2 ** (1 / 12)))
    k = band[np.argmax(spec[band])]
    a, b, c = np.log(spec[k - 1:k + 2])
    p = 0.5 * (a - c) / (a - 2 * b + c)
    return float((k + p) * rate / n)


def test_every_take_is_in_tune_within_half_a_cent(baked):
    one, _ = baked
    for t in _map(one)["takes"]:
        x, rate = sf.read(str(one / t["file"]), dtype="float64")
        want = 440.0 * 2 ** ((t["note"] - 69) / 12)      # MIDI Tuning Standard: A4 = note 69 = 440 Hz
        got = _fundamental_hz(x, rate, want)
        cents = 1200 * np.log2(got / want)
        assert abs(cents) <= 0.5, f"{t['file']}: {got:.4f} Hz is {cents:+.3f} cents from {want:.4f} Hz"


def test_rerun_skips_intact_takes_and_redoes_a_changed_one(baked, tmp_path, capsys):
    _, two = baked
    folder = tmp_path / "set"
    folder.mkdir()
    for p in two.iterdir():
        (folder / p.name).write_bytes(p.read_bytes())
    victim = folder / "n060-v110-r1.wav"
    want = samples_sha256(victim)
    x, rate = sf.read(str(victim), dtype="float32")
    sf.write(str(victim), x * 0.5, rate, subtype="PCM_24")
    assert samples_sha256(victim) != want
    capsys.readouterr()
    assert _bake(folder, "--workers", "1") == 0
    assert f"1 rendered, {N_TAKES - 1} unchanged" in capsys.readouterr().out
    assert samples_sha256(victim) == want
    assert _map(folder) == _map(two)


def test_intact_rerun_starts_no_cluster_and_says_when_matplotlib_is_missing(baked, tmp_path, capsys, monkeypatch):
    _, two = baked
    folder = tmp_path / "set"
    folder.mkdir()
    for p in two.iterdir():
        if p.suffix != ".png":
            (folder / p.name).write_bytes(p.read_bytes())

    def no_cluster(*a, **k):
        raise AssertionError("a cluster was started for a set with nothing to render")

    monkeypatch.setattr(bake_command, "open_cluster", no_cluster)
    monkeypatch.setitem(sys.modules, "matplotlib", None)        # import matplotlib now raises ImportError
    capsys.readouterr()
    assert _bake(folder, "--workers", "2") == 0
    cap = capsys.readouterr()
    assert f"0 rendered, {N_TAKES} unchanged" in cap.out
    lines = cap.err.strip().splitlines()
    assert lines[-1] == "contact sheet skipped: matplotlib is not installed (pip install 'sheafsynth[plot]')"
    assert all(ln.startswith("checking the stability of") for ln in lines[:-1])     # the guard's progress line
    assert not (folder / "contact-sheet.png").exists()


def test_loudness_is_normalized_per_bs1770():
    preset = load_preset(next(p for p in factory_presets() if p.stem == PRESET))
    for target in (-30.0, -23.0):
        r = render_take(preset, Take(60, 100, 0), TakeSettings(48000, 1.5, 1.125, target, 0))
        ref = pyloudnorm.Meter(48000).integrated_loudness(r["audio"].astype(np.float64))
        if r["ceiling_held"]:
            assert ref < target and np.max(np.abs(r["audio"])) == pytest.approx(10 ** (-1 / 20), rel=1e-6)
        else:
            assert ref == pytest.approx(target, abs=0.05)
        assert np.max(np.abs(r["audio"])) <= 10 ** (-1 / 20) * (1 + 1e-6)     # never above the -1 dBFS ceiling


@pytest.mark.parametrize("extra, words", [
    (["--notes", "60-40"], "--notes '60-40'"),
    (["--notes", "0-20/3"], "outside the preset's playable range"),
    (["--notes", "4x"], "--notes '4x'"),
    (["--notes", "48-60/0"], "STEP >= 1"),
    (["--velocities", "0,100"], "velocity 0 is outside 1-127"),
    (["--velocities", "128"], "velocity 128"),
    (["--rounds", "0"], "--rounds 0"),
])
def test_bad_notes_or_velocities_get_one_line_and_status_2(extra, words, tmp_path, capsys):
    rc = cli.main(["bake", PRESET, "--out", str(tmp_path / "x"), "--seconds-max", "1", *extra])
    err = capsys.readouterr().err
    assert rc == 2
    assert len(err.strip().splitlines()) == 1 and words in err and "Traceback" not in err
    assert not (tmp_path / "x").exists()


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def test_unreachable_scheduler_is_a_clear_error_within_10_s(tmp_path, capsys):
    t0 = time.monotonic()
    rc = cli.main(["bake", PRESET, "--out", str(tmp_path), "--notes", "60", "--seconds-max", "1",
                   "--scheduler", f"tcp://127.0.0.1:{_free_port()}"])
    elapsed = time.monotonic() - t0
    err = capsys.readouterr().err
    assert rc == 2 and "no dask scheduler answered" in err and len(err.strip().splitlines()) == 1
    assert elapsed < 10.0      # the bound on the wait, not a speed goal


def test_a_listener_that_is_not_a_scheduler_is_a_clear_error(tmp_path, capsys):
    with socket.socket() as srv:
        srv.bind(("127.0.0.1", 0))
        srv.listen()

        def answer():          # whatever connects gets a line of text that is not dask's protocol
            for _ in range(4):
                try:
                    conn, _ = srv.accept()
                except OSError:
                    return
                with conn:
                    conn.sendall(b"HTTP/1.0 200 OK\r\n\r\nhello\r\n")

        t = threading.Thread(target=answer, daemon=True)
        t.start()
        port = srv.getsockname()[1]
        rc = cli.main(["bake", PRESET, "--out", str(tmp_path), "--notes", "60", "--seconds-max", "1",
                       "--scheduler", f"tcp://127.0.0.1:{port}"])
    err = capsys.readouterr().err
    assert rc == 2 and f"--scheduler tcp://127.0.0.1:{port}: no dask scheduler answered" in err
    assert len(err.strip().splitlines()) == 1
    assert not list(tmp_path.glob("*.wav"))


def test_scheduler_address_that_is_not_an_address(tmp_path, capsys):
    rc = cli.main(["bake", PRESET, "--out", str(tmp_path), "--notes", "60", "--seconds-max", "1",
                   "--scheduler", "nonsense"])
    err = capsys.readouterr().err
    assert rc == 2 and "--scheduler nonsense: not an address such as tcp://host:8786" in err


def test_unwritable_folder_is_refused_before_any_work(tmp_path, capsys):
    blocker = tmp_path / "a-file"
    blocker.write_text("")
    rc = cli.main(["bake", PRESET, "--out", str(blocker / "set"), "--notes", "60", "--seconds-max", "1"])
    err = capsys.readouterr().err
    assert rc == 2 and f"--out {blocker / 'set'}: cannot write there" in err


def test_a_write_failing_part_way_leaves_no_partial_take(tmp_path):
    """A file-size limit (RLIMIT_FSIZE, with SIGXFSZ ignored so writes fail with EFBIG) stands in for a
    full disk: the first take cannot be written whole."""
    out = tmp_path / "set"
    # the kernel and the stability verdict are built here first, so the limit hits only the take's write
    preset = bank.load(PRESET)          # as the command loads it
    guard(preset, rate=48000.0)
    render_take(preset, Take(60, 100, 0), TakeSettings(48000, 0.1, 0.05, None, 0))

    def limit():
        signal.signal(signal.SIGXFSZ, signal.SIG_IGN)
        resource.setrlimit(resource.RLIMIT_FSIZE, (64 * 1024, 64 * 1024))

    proc = subprocess.run(
        [sys.executable, "-m", "sheafsynth.host.cli", "bake", PRESET, "--out", str(out), "--notes", "60",
         "--seconds-max", "1.5", "--hold", "1.4", "--workers", "1"],
        preexec_fn=limit, capture_output=True, text=True, timeout=300, env={**os.environ, "CI": "true"})
    assert proc.returncode == 1, proc.stderr
    assert "writing" in proc.stderr and "failed" in proc.stderr and "no partial take" in proc.stderr
    assert "Traceback" not in proc.stderr
    assert not (out / "n060-v100-r0.wav").exists()
    assert not [p for p in out.iterdir() if p.suffix == ".wav" or p.name.endswith(".wav")]

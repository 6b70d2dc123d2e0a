"""No lost presets: a save killed at any moment leaves the old file or the new one, whole.

A child process saves user presets (host.bank.save_user_preset) and is
killed with SIGKILL, either at each step of the atomic save in turn
(temp file created, half written, written, fsynced, renamed, folder
fsynced) or at random moments while it saves in a loop.  After every kill
the preset file must be valid JSON equal to one complete version, load as a
preset, and be listed by the bank without an error.

A corrupt user preset (cut short, binary garbage, empty, another format,
a newer version, nested too deeply, a folder, not UTF-8) is reported by
name and skipped by the bank and ``sheafsynth presets``; nothing is
deleted or changed.
"""

from __future__ import annotations

import json
import os
import random
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from tests.live import REPO

NAME = "kill-test"

CHILD = r"""
import copy, json, os, signal, sys, tempfile
user_dir, mode = sys.argv[1], sys.argv[2]
os.environ["SHEAFSYNTH_USER_DIR"] = user_dir
sys.path.insert(0, sys.argv[3])
from sheafsynth.host.bank import save_user_preset
BASE = json.loads(sys.argv[4])

def version(k):
    d = copy.deepcopy(BASE)
    d["about"] = f"version {k} " + "x" * (1000 + 37 * (k % 50))
    d["parameters"]["decay"]["value"] = 0.95 + 0.0001 * (k % 400)
    return d

def die():
    os.kill(os.getpid(), signal.SIGKILL)

if mode.startswith("point:"):
    point = mode.split(":", 1)[1]
    real = {n: getattr(os, n) for n in ("fsync", "replace", "chmod", "fdopen", "open")}
    real_mkstemp = tempfile.mkstemp
    fsyncs = [0]
    def mkstemp(*a, **k):
        r = real_mkstemp(*a, **k)
        if point == "after-mkstemp": die()
        return r
    def chmod(*a, **k):
        real["chmod"](*a, **k)
        if point == "after-chmod": die()
    class HalfFile:
        def __init__(self, f): self.f = f
        def write(self, text):
            if point == "mid-write":
                self.f.write(text[: len(text) // 2]); self.f.flush(); real["fsync"](self.f.fileno()); die()
            r = self.f.write(text)
            if point == "after-write": die()
            return r
        def __getattr__(self, n): return getattr(self.f, n)
        def __enter__(self): self.f.__enter__(); return self
        def __exit__(self, *e): return self.f.__exit__(*e)
    def fdopen(*a, **k):
        return HalfFile(real["fdopen"](*a, **k))
    def fsync(fd):
        real["fsync"](fd)
        fsyncs[0] += 1
        if point == "after-file-fsync" and fsyncs[0] == 1: die()
        if point == "after-dir-fsync" and fsyncs[0] == 2: die()
    def replace(a, b):
        if point == "before-rename": die()
        real["replace"](a, b)
        if point == "after-rename": die()
    tempfile.mkstemp, os.chmod, os.fdopen, os.fsync, os.replace = mkstemp, chmod, fdopen, fsync, replace
    save_user_preset(version(2), "@NAME@")
    print("finished", flush=True)
else:
    from sheafsynth.engine.preset import load_preset
    load_preset(version(0))            # warm up: the first validation builds the schema validator
    print("ready", flush=True)
    k = 2
    while True:
        save_user_preset(version(k), "@NAME@")
        k += 1
""".replace("@NAME@", NAME)

POINTS = ["after-mkstemp", "after-chmod", "mid-write", "after-write", "after-file-fsync",
          "before-rename", "after-rename", "after-dir-fsync"]


def _base_doc() -> dict:
    from tests.engine.preset.test_preset import BASE

    return json.loads(json.dumps(BASE))


def _version(k: int) -> dict:
    d = _base_doc()
    d["about"] = f"version {k} " + "x" * (1000 + 37 * (k % 50))
    d["parameters"]["decay"]["value"] = 0.95 + 0.0001 * (k % 400)
    d["name"] = NAME
    return d


def _child(user_dir: Path, mode: str) -> subprocess.Popen:
    return subprocess.Popen([sys.executable, "-c", CHILD, str(user_dir), mode, str(REPO), json.dumps(_base_doc())],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, stdin=subprocess.DEVNULL, text=True)


def _check_whole(user_dir: Path, allowed: set[int] | None) -> int:
    """The preset file is one complete version (returns its number); the bank lists it cleanly."""
    from sheafsynth.engine.preset import load_preset
    from sheafsynth.host import bank

    path = user_dir / f"{NAME}.json"
    assert path.exists(), "the preset file is gone"
    text = path.read_text(encoding="utf-8")
    doc = json.loads(text)                      # whole JSON, not a truncated file
    k = int(doc["about"].split()[1])
    assert doc == _version(k), f"file content is not exactly version {k}"
    if allowed is not None:
        assert k in allowed, f"version {k} is neither the old nor the new file"
    load_preset(path)
    listed = [e for e in bank.entries() if e.origin == "user"]
    assert [e.name for e in listed] == [NAME] and listed[0].error is None, listed
    return k


@pytest.fixture
def seeded_user_dir(user_dir):
    from sheafsynth.host.bank import save_user_preset

    save_user_preset(_version(1), NAME)
    return user_dir


@pytest.mark.parametrize("point", POINTS)
def test_kill_at_each_step_of_a_save_keeps_old_or_new(seeded_user_dir, point):
    proc = _child(seeded_user_dir, f"point:{point}")
    out, err = proc.communicate(timeout=120)
    assert proc.returncode == -signal.SIGKILL, f"the child was not killed at {point}: {out}{err}"
    k = _check_whole(seeded_user_dir, {1, 2})
    # before the rename the old file must still be there; after it, the new one
    expect_new = point in ("after-rename", "after-dir-fsync")
    assert k == (2 if expect_new else 1), f"killed {point}: found version {k}"


def test_kill_at_random_moments_while_saving_repeatedly(seeded_user_dir):
    rng = random.Random(11)
    seen = set()
    kills = 16
    for _ in range(kills):
        proc = _child(seeded_user_dir, "loop")
        line = proc.stdout.readline().strip()
        assert line == "ready", proc.stderr.read()
        time.sleep(rng.uniform(0.0, 0.12))
        proc.send_signal(signal.SIGKILL)
        proc.wait(30)
        seen.add(_check_whole(seeded_user_dir, None))
    # the loop was interrupted mid-stream: it wrote new versions and each time left a whole file
    assert len(seen) > 1, f"no save finished before any kill (versions seen: {seen})"


def test_a_later_save_sweeps_the_temp_files_killed_saves_left(seeded_user_dir):
    """Killed saves leave hidden temp files; the next save of that preset removes
    the stale ones (untouched for engine.preset.save.STALE_TEMP_S) and nothing else."""
    from sheafsynth.engine.preset import STALE_TEMP_S, sweep_stale_temps
    from sheafsynth.host.bank import save_user_preset

    d = seeded_user_dir
    for _ in range(3):                                     # real leftovers, from real kills
        proc = _child(d, "point:after-write")
        proc.communicate(timeout=120)
        assert proc.returncode == -signal.SIGKILL
    left = sorted(p.name for p in d.glob(f".{NAME}.json.*.tmp"))
    assert len(left) == 3, left
    old = time.time() - STALE_TEMP_S - 60
    for name in left[:2]:
        os.utime(d / name, (old, old))
    keep = {                                               # not ours, or not stale: kept
        left[2]: None,
        ".other.json.abcd1234.tmp": b"other preset's write",
        f".{NAME}.json.notes": b"user's own hidden file",
        f"{NAME}.json.abcd1234.tmp": b"not hidden",
    }
    for name, data in keep.items():
        if data is not None:
            (d / name).write_bytes(data)
            os.utime(d / name, (old, old))
    before = {p.name: p.read_bytes() for p in d.iterdir() if p.name in keep}
    save_user_preset(_version(3), NAME)
    after = {p.name for p in d.iterdir()}
    assert not any(name in after for name in left[:2]), "stale temp files were not swept"
    assert {p.name: p.read_bytes() for p in d.iterdir() if p.name in keep} == before
    assert _check_whole(d, {3}) == 3
    assert sweep_stale_temps(d / f"{NAME}.json", older_than_s=0.0) == 1    # the fresh one, when asked
    assert sweep_stale_temps(d / "missing-folder" / "x.json") == 0


# ---------------------------------------------------------------- corrupt user presets

def _corrupt_files(d: Path) -> dict[str, bytes | None]:
    good = json.dumps({**_base_doc(), "name": "good-one"}).encode()
    files = {
        "good-one": good,
        "cut-short": good[: len(good) // 2],
        "garbage": bytes(random.Random(5).randrange(256) for _ in range(700)),
        "empty": b"",
        "a-list": b"[1, 2, 3]",
        "other-format": json.dumps({"format": "some-other-synth", "version": 1}).encode(),
        "from-the-future": json.dumps({**_base_doc(), "version": 99}).encode(),
        "too-deep": b'{"format": "sheafsynth-preset", "version": 1, "about": ' + b"[" * 50000 + b"]" * 50000 + b"}",
        "huge-number": good.replace(b'"value": 0.99', b'"value": 1e999'),
        "latin1": good.replace(b"good-one", "g\u00f6\u00f6d".encode("latin-1")),
        "a-folder": None,
    }
    d.mkdir(parents=True, exist_ok=True)
    for name, data in files.items():
        if data is None:
            (d / f"{name}.json").mkdir()
        else:
            (d / f"{name}.json").write_bytes(data)
    return files


def _snapshot(d: Path) -> dict[str, tuple]:
    out = {}
    for p in sorted(d.iterdir()):
        st = p.stat()
        out[p.name] = (p.is_dir(), st.st_mtime_ns, p.read_bytes() if p.is_file() else None)
    return out


def test_corrupt_user_presets_are_reported_by_name_and_kept(user_dir):
    from sheafsynth.host import bank

    files = _corrupt_files(user_dir)
    before = _snapshot(user_dir)
    entries = {e.name: e for e in bank.entries() if e.origin == "user"}
    assert set(entries) == set(files), "a user preset file is missing from the listing"
    assert entries["good-one"].error is None
    for name in files:
        if name != "good-one":
            assert entries[name].error, f"{name}.json is broken but reported no error"
    usable = [e.name for e in bank.entries(include_broken=False) if e.origin == "user"]
    assert usable == ["good-one"]
    assert _snapshot(user_dir) == before, "listing the bank changed or deleted a file"


def test_presets_command_lists_broken_files_and_exits_0(user_dir):
    files = _corrupt_files(user_dir)
    before = _snapshot(user_dir)
    env = dict(os.environ, SHEAFSYNTH_USER_DIR=str(user_dir))
    r = subprocess.run([sys.executable, "-m", "sheafsynth.host.cli", "presets", "--json"], cwd=REPO, env=env,
                       capture_output=True, text=True, timeout=120, stdin=subprocess.DEVNULL)
    assert r.returncode == 0, r.stderr
    assert "Traceback" not in r.stderr
    listed = {e["name"]: e for e in json.loads(r.stdout) if e["origin"] == "user"}
    assert set(listed) == set(files)
    assert all(listed[n]["error"] for n in files if n != "good-one")
    r = subprocess.run([sys.executable, "-m", "sheafsynth.host.cli", "presets"], cwd=REPO, env=env,
                       capture_output=True, text=True, timeout=120, stdin=subprocess.DEVNULL)
    assert r.returncode == 0 and "Traceback" not in r.stderr
    for name in files:
        line = next(ln for ln in r.stdout.splitlines() if f" {name} " in ln)
        assert ("unusable:" in line) == (name != "good-one"), line
    for name in ("cut-short", "too-deep", "a-folder"):
        r = subprocess.run([sys.executable, "-m", "sheafsynth.host.cli", "render", name, "--out", os.devnull], cwd=REPO,
                           env=env, capture_output=True, text=True, timeout=120, stdin=subprocess.DEVNULL)
        assert r.returncode == 2, r.stderr
        assert "Traceback" not in r.stderr and r.stderr.startswith("sheafsynth: ")
        assert name in r.stderr, f"the message does not name the file: {r.stderr}"
    assert _snapshot(user_dir) == before, "a command changed or deleted a user preset file"

"""Tests for engine.backends.c.build: cffi compile with a content-addressed cache."""

import multiprocessing
import os
import subprocess
import sys
import textwrap
import uuid
from pathlib import Path

import pytest

from sheafsynth.engine.backends.c import build
from sheafsynth.engine.errors import BuildError, SheafsynthError

CDEF = "int ss_test_add(int a, int b);"
REPO = Path(__file__).resolve().parents[3]


def _source(salt: str) -> str:
    # A unique comment keeps each test's module apart from the process memo.
    return f"/* {salt} */\nstatic int ss_test_add(int a, int b) {{ return a + b; }}\n"


@pytest.fixture
def cache(tmp_path, monkeypatch):
    d = tmp_path / "kernels"
    monkeypatch.setenv("SHEAFSYNTH_CACHE_DIR", str(d))
    return d


def _run_in_fresh_process(cache_dir: Path, source: str) -> str:
    code = textwrap.dedent(f"""
        from sheafsynth.engine.backends.c import build
        m = build.compile_module({CDEF!r}, {source!r}, tag="t")
        print(m.lib.ss_test_add(40, 2), m.cached, build.compile_count(), m.path)
    """)
    env = dict(os.environ, SHEAFSYNTH_CACHE_DIR=str(cache_dir))
    out = subprocess.run([sys.executable, "-c", code], cwd=REPO, env=env,
                         capture_output=True, text=True, check=True)
    return out.stdout.strip()


def test_compile_and_call(cache):
    m = build.compile_module(CDEF, _source(uuid.uuid4().hex), tag="t")
    assert m.lib.ss_test_add(2, 3) == 5
    assert m.cached is False
    assert m.module_name.startswith("_ss_t_") and len(m.module_name) == len("_ss_t_") + 16
    assert m.path.parent == cache and m.path.exists()
    assert m.path.name.startswith(m.module_name)
    assert not list(cache.glob(".build-*")), "temporary build directory left behind"


def test_second_call_is_cached_without_compiler(cache):
    src = _source(uuid.uuid4().hex)
    first = build.compile_module(CDEF, src, tag="t")
    runs = build.compile_count()
    second = build.compile_module(CDEF, src, tag="t")
    assert second.cached is True
    assert build.compile_count() == runs
    assert second.module_name == first.module_name
    assert second.lib.ss_test_add(1, 1) == 2


def test_fresh_process_loads_from_disk_without_compiler(cache):
    src = _source(uuid.uuid4().hex)
    build.compile_module(CDEF, src, tag="t")
    result, cached, runs, _path = _run_in_fresh_process(cache, src).split()
    assert (result, cached, runs) == ("42", "True", "0")


def test_same_input_same_name_different_input_different_name(cache, tmp_path):
    inc = tmp_path / "inc"
    inc.mkdir()
    (inc / "ss_test_k.h").write_text("#define SS_TEST_K 1\n")
    src = "#include \"ss_test_k.h\"\nstatic int ss_test_add(int a, int b) { return a + b + SS_TEST_K; }\n"
    a = build.compile_module(CDEF, src, tag="t", include_dirs=[inc])
    assert a.lib.ss_test_add(1, 1) == 3
    (inc / "ss_test_k.h").write_text("#define SS_TEST_K 2\n")
    b = build.compile_module(CDEF, src, tag="t", include_dirs=[inc])
    assert b.module_name != a.module_name, "header change must change the hash"
    assert b.lib.ss_test_add(1, 1) == 4
    c = build.compile_module(CDEF, src, tag="t", include_dirs=[inc], extra_compile_args=["-DSS_UNUSED=1"])
    assert c.module_name != b.module_name, "flag change must change the hash"


def test_syntax_error_is_build_error_with_compiler_lines(cache):
    bad = "static int ss_test_add(int a, int b) { return a + b }\n"
    with pytest.raises(BuildError) as info:
        build.compile_module(CDEF, bad, tag="t")
    msg = str(info.value)
    assert isinstance(info.value, SheafsynthError)
    assert "error" in msg and "Traceback" not in msg
    assert len(msg.splitlines()) < 20
    assert not list(cache.glob("*.so")), "a failed build must not leave a module"


def test_strict_rejects_unused_variable(cache):
    src = f"/* {uuid.uuid4().hex} */\nstatic int ss_test_add(int a, int b) {{ int unused; return a + b; }}\n"
    build.compile_module(CDEF, src, tag="t")  # lenient: builds
    with pytest.raises(BuildError, match="unused"):
        build.compile_module(CDEF, src, tag="t", strict=True)


def test_strict_accepts_clean_code(cache):
    m = build.compile_module(CDEF, _source(uuid.uuid4().hex), tag="t", strict=True)
    assert m.lib.ss_test_add(-1, 1) == 0


def test_bad_cdef_and_bad_arguments_are_build_errors(cache):
    with pytest.raises(BuildError, match="cdef"):
        build.compile_module("int ss_test_add(int a, int b)", _source("x"), tag="t")
    with pytest.raises(BuildError, match="tag"):
        build.compile_module(CDEF, _source("x"), tag="no/slash")
    with pytest.raises(BuildError, match="include directory"):
        build.compile_module(CDEF, _source("x"), include_dirs=["/nonexistent/ss"])


def test_missing_compiler_is_build_error(cache, monkeypatch):
    monkeypatch.setenv("CC", "/nonexistent/ss-cc")
    monkeypatch.setenv("PATH", "/nonexistent")
    with pytest.raises(BuildError, match="compiler"):
        build.compile_module(CDEF, _source(uuid.uuid4().hex), tag="t")


def test_damaged_cache_entry_is_rebuilt(cache):
    src = _source(uuid.uuid4().hex)
    *_, path = _run_in_fresh_process(cache, src).split()
    Path(path).write_bytes(b"not a shared object")
    m = build.compile_module(CDEF, src, tag="t")
    assert m.cached is False
    assert m.lib.ss_test_add(2, 2) == 4


def _concurrent_worker(cache_dir, source, barrier, queue):
    os.environ["SHEAFSYNTH_CACHE_DIR"] = cache_dir
    from sheafsynth.engine.backends.c import build as b
    barrier.wait(timeout=60)
    try:
        m = b.compile_module(CDEF, source, tag="t")
        queue.put(("ok", m.lib.ss_test_add(20, 1), str(m.path)))
    except Exception as exc:  # reported to the parent, which fails the test
        queue.put(("error", repr(exc), ""))


def test_concurrent_builds_from_two_processes(cache):
    ctx = multiprocessing.get_context("spawn")
    barrier = ctx.Barrier(2)
    queue = ctx.Queue()
    src = _source(uuid.uuid4().hex)
    procs = [ctx.Process(target=_concurrent_worker, args=(str(cache), src, barrier, queue))
             for _ in range(2)]
    for p in procs:
        p.start()
    results = [queue.get(timeout=120) for _ in procs]
    for p in procs:
        p.join(timeout=60)
    assert [r[0] for r in results] == ["ok", "ok"], results
    assert [r[1] for r in results] == [21, 21]
    assert results[0][2] == results[1][2]
    assert len(list(cache.glob("*.so"))) == 1
    assert not list(cache.glob(".build-*"))

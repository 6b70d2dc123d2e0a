"""Compile C source to a cffi API-mode extension, cached by content hash.

A module is named ``_ss_<tag>_<hash16>`` where the hash covers everything
that can change the binary: the cdef, the source, every C file in the
include directories (csrc/ always among them), the flags, the compiler's
identity, the CPU model (flags contain ``-march=native``), the cffi version
and the Python ABI.  Same input, same name: a second request loads the
existing shared object without running the compiler.

cffi writes the C text (``FFI.emit_c_code``); this module runs the compiler
itself with ``subprocess`` so that the working directory and the
environment of the process are never touched and the compiler's messages
can be put into a :class:`BuildError`.  The object is built in a private
temporary directory inside the cache directory and renamed into place with
``os.replace``, so two processes never see a half-written file.

Build kernels in the main thread before any audio stream starts: compiling
takes seconds and loading an extension takes the import lock.
"""

from __future__ import annotations

import dataclasses
import hashlib
import importlib.machinery
import importlib.util
import os
import platform
import shlex
import shutil
import subprocess
import sys
import sysconfig
import tempfile
import threading
import time
from pathlib import Path
from typing import Any, Iterable, Sequence

import cffi
from cffi.recompiler import make_c_source

from sheafsynth.engine.errors import BuildError
from sheafsynth.engine.locations import CSRC_DIR, cache_dir

__all__ = [
    "CompiledModule",
    "compile_module",
    "compile_count",
    "BASE_FLAGS",
    "STRICT_FLAGS",
]

#: The hand-written C runtime; always on the include path and in the hash.

#: Optimisation without -ffast-math: the kernels' non-finite guard needs
#: isnan/isinf to keep their meaning.
BASE_FLAGS: tuple[str, ...] = (
    "-std=c99",
    "-O3",
    "-fno-math-errno",
    "-fno-trapping-math",
    "-march=native",
    "-fPIC",
)

#: Added by ``strict=True`` (tests compile generated code this way).
STRICT_FLAGS: tuple[str, ...] = ("-Wall", "-Wextra", "-Werror")

_MAX_ERROR_LINES = 12

_lock = threading.Lock()
_compile_count = 0
_loaded: dict[str, "CompiledModule"] = {}
_compiler_id_memo: dict[str, str] = {}
_cpu_memo: list[str] = []


@dataclasses.dataclass(frozen=True)
class CompiledModule:
    """A loaded cffi extension.

    ``ffi`` and ``lib`` are the module's own; ``path`` is the shared object;
    ``cached`` is True when it was loaded without running the compiler.
    """

    ffi: Any
    lib: Any
    path: Path
    module_name: str
    cached: bool


def compile_count() -> int:
    """Number of compiler runs in this process (lets tests prove a cache hit)."""
    return _compile_count


def compile_module(
    cdef: str,
    source: str,
    *,
    tag: str = "k",
    include_dirs: Iterable[str | os.PathLike] = (),
    extra_compile_args: Iterable[str] = (),
    strict: bool = False,
) -> CompiledModule:
    """Compile (or load from cache) a cffi module; returns a CompiledModule.

    ``cdef`` declares what Python sees, ``source`` is the C text placed
    after cffi's prelude.  ``tag`` (letters, digits, underscore) goes into
    the module name for people reading the cache directory.  Raises
    BuildError naming the first compiler errors when the C does not build.
    """
    if not isinstance(cdef, str) or not isinstance(source, str):
        raise BuildError("compile_module: cdef and source must be str")
    if not isinstance(tag, str) or not tag or not tag.replace("_", "").isalnum() or not tag.isascii():
        raise BuildError(f"compile_module: tag {tag!r} must be ASCII letters, digits or '_'")
    incs = [CSRC_DIR] + [Path(d).resolve() for d in include_dirs]
    for d in incs:
        if not d.is_dir():
            raise BuildError(f"compile_module: include directory {str(d)!r} does not exist")
    extra = [str(a) for a in extra_compile_args]
    flags = list(BASE_FLAGS) + (list(STRICT_FLAGS) if strict else []) + extra
    compiler = _compiler()

    digest = _hash(cdef, source, incs, flags, compiler)
    module_name = f"_ss_{tag}_{digest[:16]}"

    with _lock:
        memo = _loaded.get(module_name)
        if memo is not None:
            return dataclasses.replace(memo, cached=True)

        root = cache_dir()
        try:
            root.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise BuildError(f"cannot create kernel cache directory {root}: {exc.strerror}") from None
        target = root / (module_name + _ext_suffix())

        cached = target.exists()
        if not cached:
            _build(cdef, source, module_name, incs, flags, compiler, root, target)
        try:
            mod = _load(module_name, target)
        except ImportError as exc:
            if not cached:
                raise BuildError(f"built {target.name} but could not load it: {exc}") from None
            # A damaged cache entry: rebuild once.
            _build(cdef, source, module_name, incs, flags, compiler, root, target)
            try:
                mod = _load(module_name, target)
            except ImportError as exc2:
                raise BuildError(f"could not load {target.name}: {exc2}") from None
            cached = False
        result = CompiledModule(ffi=mod.ffi, lib=mod.lib, path=target,
                                module_name=module_name, cached=cached)
        _loaded[module_name] = result
        return result


# --------------------------------------------------------------------------
# internals


def _ext_suffix() -> str:
    return importlib.machinery.EXTENSION_SUFFIXES[0]


def _compiler() -> list[str]:
    """The C compiler command: $CC, else sysconfig's CC, else 'cc'."""
    cc = os.environ.get("CC") or sysconfig.get_config_var("CC") or "cc"
    argv = shlex.split(cc)
    if not argv or shutil.which(argv[0]) is None:
        if shutil.which("cc") is not None:
            return ["cc"]
        raise BuildError(f"C compiler {cc!r} not found: install gcc or clang, or set CC")
    return argv


def _compiler_identity(compiler: list[str]) -> str:
    key = " ".join(compiler)
    ident = _compiler_id_memo.get(key)
    if ident is None:
        try:
            out = subprocess.run(compiler + ["--version"], capture_output=True, text=True,
                                 timeout=30, stdin=subprocess.DEVNULL)
            first = (out.stdout or out.stderr).splitlines()
            ident = first[0].strip() if first else "unknown"
        except (OSError, subprocess.SubprocessError):
            ident = "unknown"
        _compiler_id_memo[key] = ident
    return f"{key} :: {ident}"


def _cpu_model() -> str:
    if not _cpu_memo:
        model = ""
        try:
            with open("/proc/cpuinfo", encoding="utf-8", errors="replace") as fh:
                seen = set()
                for line in fh:
                    name, _, value = line.partition(":")
                    name = name.strip()
                    if name in ("model name", "flags", "Features", "CPU part") and name not in seen:
                        seen.add(name)
                        model += f"{name}={value.strip()};"
        except OSError:
            pass
        _cpu_memo.append(model or f"{platform.machine()} {platform.processor()}")
    return _cpu_memo[0]


def _dir_digest(d: Path, h: "hashlib._Hash") -> None:
    for f in sorted(d.iterdir()):
        if f.is_file() and f.suffix in (".h", ".c", ".inc"):
            h.update(f"\0file\0{f.name}\0".encode())
            h.update(f.read_bytes())


def _hash(cdef: str, source: str, incs: Sequence[Path], flags: Sequence[str],
          compiler: list[str]) -> str:
    h = hashlib.sha256()
    for part in ("sheafsynth-build-1", cdef, source):
        h.update(part.encode("utf-8"))
        h.update(b"\0\0")
    for d in incs:
        h.update(f"\0inc\0{d}\0".encode())
        _dir_digest(d, h)
    for part in (
        "\x1f".join(flags),
        _compiler_identity(compiler),
        _cpu_model(),
        cffi.__version__,
        sys.implementation.cache_tag or "",
        _ext_suffix(),
        sysconfig.get_paths()["include"],
    ):
        h.update(b"\0")
        h.update(part.encode("utf-8"))
    return h.hexdigest()


def _link_flags() -> list[str]:
    if sys.platform == "darwin":
        return ["-bundle", "-undefined", "dynamic_lookup"]
    return ["-shared"]


def _build(cdef: str, source: str, module_name: str, incs: Sequence[Path],
           flags: Sequence[str], compiler: list[str], root: Path, target: Path) -> None:
    """Emit C with cffi, compile it in a private temp dir, rename into place."""
    global _compile_count
    ffi = cffi.FFI()
    try:
        ffi.cdef(cdef)
        ffi.set_source(module_name, source)
    except cffi.CDefError as exc:
        raise BuildError(f"bad cdef for module {module_name}: {exc}") from None
    except cffi.FFIError as exc:
        raise BuildError(f"cffi rejected module {module_name}: {exc}") from None

    _remove_stale_builds(root)
    tmp = Path(tempfile.mkdtemp(prefix=".build-", dir=root))
    try:
        c_file = tmp / (module_name + ".c")
        try:
            # The documented FFI.emit_c_code() prints a line; this is its quiet core.
            make_c_source(ffi, module_name, source, str(c_file), verbose=False)
        except (cffi.CDefError, cffi.FFIError, cffi.VerificationError) as exc:
            raise BuildError(f"cffi could not generate C for {module_name}: {exc}") from None
        so_tmp = tmp / target.name
        py_inc = sysconfig.get_paths()["include"]
        argv = (compiler + list(flags) + _link_flags()
                + [f"-I{d}" for d in incs] + [f"-I{py_inc}"]
                + [str(c_file), "-o", str(so_tmp)])
        _compile_count += 1
        try:
            proc = subprocess.run(argv, capture_output=True, text=True,
                                  stdin=subprocess.DEVNULL, cwd=str(tmp), timeout=600)
        except OSError as exc:
            raise BuildError(f"could not run C compiler {compiler[0]!r}: {exc.strerror}") from None
        except subprocess.TimeoutExpired:
            raise BuildError(f"C compiler timed out on module {module_name}") from None
        if proc.returncode != 0 or not so_tmp.exists():
            log = (proc.stderr or "") + (proc.stdout or "")
            kept = _keep_failure(root, module_name, c_file, log)
            raise BuildError(
                f"C compile of module {module_name} failed (exit {proc.returncode}):\n"
                + _first_errors(log, str(tmp) + os.sep)
                + (f"\n(full log and source kept in {kept})" if kept else "")
            )
        os.replace(so_tmp, target)
    finally:
        shutil.rmtree(tmp, ignore_errors=True)


def _remove_stale_builds(root: Path, max_age_s: float = 3600.0) -> None:
    """Remove temp build dirs left by killed processes (older than max_age_s s)."""
    now = time.time()
    for d in root.glob(".build-*"):
        try:
            if now - d.stat().st_mtime > max_age_s:
                shutil.rmtree(d, ignore_errors=True)
        except OSError:
            pass


def _first_errors(log: str, strip_prefix: str) -> str:
    """The first error lines of a compiler log, paths shortened."""
    lines = [ln.replace(strip_prefix, "") for ln in log.splitlines() if ln.strip()]
    start = next((i for i, ln in enumerate(lines) if "error" in ln.lower()), 0)
    picked = lines[start:start + _MAX_ERROR_LINES]
    return "\n".join(picked) if picked else "(the compiler printed nothing)"


def _keep_failure(root: Path, module_name: str, c_file: Path, log: str) -> Path | None:
    """Keep the failing source and log under <cache>/failed/ for debugging."""
    try:
        dest = root / "failed"
        dest.mkdir(exist_ok=True)
        shutil.copyfile(c_file, dest / c_file.name)
        (dest / (module_name + ".log")).write_text(log, encoding="utf-8")
        return dest
    except OSError:
        return None


def _load(module_name: str, path: Path):
    spec = importlib.util.spec_from_file_location(module_name, str(path))
    if spec is None or spec.loader is None:
        raise ImportError(f"no loader for {path}")
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return mod

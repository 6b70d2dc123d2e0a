"""Build an LV2 bundle from a preset's step programs, one kernel per sample rate.

``build_bundle`` takes the programs the caller lowered (one per rate, Hz,
each with the ramp limits its stability certificate needs), emits each
kernel with engine.backends.c.emit (the same generator every other client
uses), compiles each to an object whose exported entry points are renamed
``ssk<RATE>_*`` by the preprocessor, compiles the hand-written wrapper
csrc/lv2/ss_lv2.c against a generated ``ss_lv2_config.h`` (numbers and
checked names only), and links one shared object.  Everything is compiled
with ``-Wall -Wextra -Werror`` and ``-fvisibility=hidden``: the only
exported symbol is ``lv2_descriptor``.  ``-march=native`` is left out so
the bundle runs on other machines of the same architecture.

The bundle is written into a temporary folder beside its destination and
renamed into place; an existing bundle of the same name is replaced only
after the new one is complete.  Build files live in a private temporary
folder that is always removed.
"""

from __future__ import annotations

import math
import os
import shlex
import shutil
import subprocess
import sysconfig
import tempfile
from dataclasses import dataclass
from pathlib import Path

from sheafsynth.engine.backends.c.build import BASE_FLAGS, STRICT_FLAGS
from sheafsynth.engine.backends.c.emit import generate
from sheafsynth.engine.backends.c.text import dnum, num
from sheafsynth.engine.backends.lv2.names import plugin_uri, port_symbols, slug
from sheafsynth.engine.backends.lv2.ttl import PortSpec, manifest_ttl, plugin_ttl
from sheafsynth.engine.errors import BuildError
from sheafsynth.engine.ir.program import StepProgram
from sheafsynth.engine.locations import CSRC_DIR

__all__ = ["LV2_RATES", "DEFAULT_RATES", "MidiBinding", "RESERVED_CCS", "LV2_MAX_BLOCK", "KERNEL_ENTRY_POINTS", "Bundle", "build_bundle", "wrapper_source"]

#: Sample rates (Hz) a bundle may hold a kernel for; instantiate refuses a rate it holds none for.
LV2_RATES: tuple[int, ...] = (44100, 48000, 88200, 96000, 192000)

#: The rates (Hz) built when none are asked for (192 kHz doubles the stability check's work: on request).
DEFAULT_RATES: tuple[int, ...] = (44100, 48000, 88200, 96000)

#: Largest kernel block (samples); the wrapper splits longer runs.
LV2_MAX_BLOCK = 512

#: The kernel ABI's exported entry points (csrc/ss_abi.h), renamed per rate.
KERNEL_ENTRY_POINTS = ("state_size", "init", "render", "set_limiter", "set_param_now", "set_ramp",
                       "get_param", "voices")

_PORTABLE_FLAGS = tuple(f for f in BASE_FLAGS if not f.startswith("-march=")) + STRICT_FLAGS + (
    "-fvisibility=hidden",)
_COMPILE_TIMEOUT_S = 600


@dataclass(frozen=True)
class MidiBinding:
    """A MIDI controller moving one parameter: ``source`` "cc" (number ``cc``), "velocity" or "pressure";
    the position x in [0, 1] maps to ``lo + (hi - lo) x`` ("linear") or ``lo (hi / lo)^x`` ("exp"),
    in the parameter's unit."""

    source: str
    cc: int
    index: int
    lo: float
    hi: float
    curve: str


_SOURCES = {"cc": 0, "velocity": 1, "pressure": 2}
_CURVES = {"linear": 0, "exp": 1}
#: Controllers the wrapper keeps for itself (sustain, sound and notes off, reset, RPN, data entry).
RESERVED_CCS = frozenset({6, 38, 64, 100, 101, 120, 121, 123, 124, 125, 126, 127})


@dataclass(frozen=True)
class Bundle:
    """A written bundle: its folder, plugin URI, rates (Hz) and control ports."""

    path: Path
    uri: str
    rates: tuple[int, ...]
    ports: tuple[PortSpec, ...]


def wrapper_source() -> Path:
    """The hand-written wrapper's C file (shipped as package data)."""
    return CSRC_DIR / "lv2" / "ss_lv2.c"


def _compiler() -> list[str]:
    cc = os.environ.get("CC") or sysconfig.get_config_var("CC") or "cc"
    argv = shlex.split(cc)
    if not argv or shutil.which(argv[0]) is None:
        raise BuildError(f"C compiler {cc!r} not found: install gcc or clang, or set CC")
    return argv


def _run(argv: list[str], what: str, cwd: Path) -> None:
    try:
        proc = subprocess.run(argv, capture_output=True, text=True, stdin=subprocess.DEVNULL, cwd=str(cwd),
                              timeout=_COMPILE_TIMEOUT_S)
    except OSError as exc:
        raise BuildError(f"could not run the C compiler {argv[0]!r}: {exc.strerror}") from None
    except subprocess.TimeoutExpired:
        raise BuildError(f"the C compiler timed out on {what}") from None
    if proc.returncode != 0:
        log = [ln.replace(str(cwd) + os.sep, "") for ln in ((proc.stderr or "") + (proc.stdout or "")).splitlines()
               if ln.strip()]
        first = next((ln for ln in log if "error" in ln.lower()), log[0] if log else "the compiler printed nothing")
        raise BuildError(f"C compile of {what} failed (exit {proc.returncode}): {first.strip()}")


def _binding_lines(prog: StepProgram, bindings: tuple[MidiBinding, ...]) -> list[str]:
    """The controller table of ss_lv2_config.h (numbers only), each binding checked."""
    rows = []
    for b in bindings:
        if b.source not in _SOURCES or b.curve not in _CURVES:
            raise BuildError(f"controller binding {b.source!r}/{b.curve!r} is not one the plugin knows")
        if b.source == "cc" and not (0 <= int(b.cc) <= 127 and int(b.cc) not in RESERVED_CCS):
            raise BuildError(f"CC {b.cc} cannot be bound to a parameter in the plugin")
        if not 0 <= int(b.index) < len(prog.params):
            raise BuildError(f"controller binding names parameter {b.index}, which does not exist")
        if b.curve == "exp" and not (b.lo > 0 and b.hi > 0):
            raise BuildError("an exp controller curve needs a range above zero")
        rows.append(f"{{{_SOURCES[b.source]}, {int(b.cc) if b.source == 'cc' else -1}, {int(b.index)}, "
                    f"{dnum(b.lo)}, {dnum(b.hi)}, {_CURVES[b.curve]}}}")
    return [f"#define SSL_NBIND {len(rows)}",
            f"static const ssl_binding ssl_bindings[{len(rows)} + 1] = {{{', '.join(rows) or '{0, -1, 0, 0.0, 0.0, 0}'}}};"]


def _config_header(prog: StepProgram, rates: tuple[int, ...], uri: str, symbols: list[str],
                   bend_range: float, bindings: tuple[MidiBinding, ...] = ()) -> str:
    """ss_lv2_config.h: rates, parameter ranges and state keys, bend range, playable notes, controllers."""
    np_ = len(prog.params)

    def arr(name: str, vals: list[float]) -> str:
        body = ", ".join(num(v) for v in vals) or "0.0f"
        return f"static const float {name}[{np_} + 1] = {{{body}}};"

    keys = ", ".join(f'"{uri}#{s}"' for s in symbols) or '""'
    lo_note, hi_note = (int(n) for n in prog.notes)
    if not 0 <= lo_note <= hi_note <= 127:
        raise BuildError(f"playable notes {prog.notes} are outside MIDI 0..127")
    return "\n".join([
        "/* Generated by sheafsynth engine.backends.lv2.bundle -- do not edit. */",
        "#ifndef SS_LV2_CONFIG_H",
        "#define SS_LV2_CONFIG_H",
        f'#define SSL_URI "{uri}"',
        f"#define SSL_NPARAM {np_}",
        f"#define SSL_MAXB {int(prog.max_block)}",
        f"#define SSL_BEND_RANGE {dnum(bend_range)}",
        f"#define SSL_NOTE_LO {lo_note}",
        f"#define SSL_NOTE_HI {hi_note}",
        "#define SSL_KERNELS(X) " + " ".join(f"X({int(r)})" for r in rates),
        arr("ssl_param_lo", [p.lo for p in prog.params]),
        arr("ssl_param_hi", [p.hi for p in prog.params]),
        arr("ssl_param_def", [p.value for p in prog.params]),
        f"static const char *const ssl_param_key[{np_} + 1] = {{{keys}}};",
        "typedef struct ssl_binding { int source, cc, index; double lo, hi; int curve; } ssl_binding;",
        *_binding_lines(prog, bindings),
        "#endif",
        ""])


def build_bundle(programs: dict[int, StepProgram], name: str, dest_dir: str | os.PathLike, *,
                 bend_range: float = 2.0, bindings: tuple[MidiBinding, ...] = ()) -> Bundle:
    """Write ``dest_dir/<slug>.lv2/`` for ``programs`` (rate in Hz -> step program of one preset).

    ``name`` is the preset's name (only its slug reaches C and TTL);
    ``bend_range`` is the pitch-bend range in semitones; ``bindings`` are the
    MIDI controllers that move parameters.  Every program must
    come from the same preset with the same parameters and ``max_block``.
    Raises BuildError with one line naming what failed.
    """
    if not programs:
        raise BuildError("no sample rates to build")
    rates = tuple(sorted(int(r) for r in programs))
    if any(r <= 0 or float(programs[r].rate) != float(r) for r in rates):
        raise BuildError("each program must be lowered at the rate it is filed under")
    first = programs[rates[0]]
    sig = [(p.name, p.lo, p.hi, p.value, p.unit) for p in first.params]
    for r in rates:
        if [(p.name, p.lo, p.hi, p.value, p.unit) for p in programs[r].params] != sig \
                or programs[r].max_block != first.max_block or programs[r].notes != first.notes:
            raise BuildError(f"the program at {r} Hz has other parameters than the one at {rates[0]} Hz")
    if not (math.isfinite(bend_range) and 0.0 <= bend_range <= 96.0):
        raise BuildError(f"bend range {bend_range!r} semitones is outside 0..96")
    s = slug(name)
    uri = plugin_uri(s)
    symbols = port_symbols([p.name for p in first.params])
    ports = tuple(PortSpec(sym, p.name, p.lo, p.hi, p.value, p.unit) for sym, p in zip(symbols, first.params))
    dest = Path(dest_dir)
    try:
        dest.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise BuildError(f"cannot create folder {str(dest)!r}: {exc.strerror}") from None
    if not dest.is_dir():
        raise BuildError(f"{str(dest)!r} is not a folder")
    final = dest / f"{s}.lv2"
    try:
        staging = Path(tempfile.mkdtemp(prefix=f".{s}.lv2.tmp-", dir=dest))
    except OSError as exc:
        raise BuildError(f"cannot write in folder {str(dest)!r}: {exc.strerror}") from None
    work = Path(tempfile.mkdtemp(prefix="sheafsynth-lv2-"))
    try:
        cc = _compiler()
        header = _config_header(first, rates, uri, symbols, bend_range, tuple(bindings))
        (work / "ss_lv2_config.h").write_text(header, encoding="utf-8")
        objects = []
        for r in rates:
            src = work / f"kernel_{r}.c"
            src.write_text(generate(programs[r]), encoding="utf-8")
            renames = [f"-Dsheafsynth_{e}=ssk{r}_{e}" for e in KERNEL_ENTRY_POINTS]
            obj = work / f"kernel_{r}.o"
            _run(cc + list(_PORTABLE_FLAGS) + renames + [f"-I{CSRC_DIR}", "-c", str(src), "-o", str(obj)],
                 f"the kernel at {r} Hz", work)
            objects.append(str(obj))
        wobj = work / "ss_lv2.o"
        _run(cc + list(_PORTABLE_FLAGS) + [f"-I{work}", f"-I{CSRC_DIR}", "-c", str(wrapper_source()),
                                             "-o", str(wobj)], "the LV2 wrapper", work)
        so = staging / f"{s}.so"
        _run(cc + ["-shared", "-fvisibility=hidden"] + objects + [str(wobj), "-o", str(so), "-lm"],
             "the plugin's shared object", work)
        (staging / "manifest.ttl").write_text(manifest_ttl(s), encoding="utf-8")
        (staging / f"{s}.ttl").write_text(plugin_ttl(s, str(name), list(ports)), encoding="utf-8")
        os.chmod(staging, 0o755)
        _install(staging, final)
    except OSError as exc:
        raise BuildError(f"cannot write the bundle in {str(dest)!r}: {exc.strerror}") from None
    finally:
        shutil.rmtree(work, ignore_errors=True)
        shutil.rmtree(staging, ignore_errors=True)
    return Bundle(final, uri, rates, ports)


def _install(staging: Path, final: Path) -> None:
    """Rename the finished ``staging`` folder to ``final``, replacing an old bundle only at the end."""
    old = None
    if final.exists() or final.is_symlink():
        if not final.is_dir() or final.is_symlink():
            raise BuildError(f"{str(final)!r} exists and is not a bundle folder; remove it first")
        old = Path(tempfile.mkdtemp(prefix=f".{final.name}.old-", dir=final.parent))
        os.rename(final, old / final.name)
    try:
        os.rename(staging, final)
    except OSError:
        if old is not None:
            os.rename(old / final.name, final)     # put the old bundle back
        raise
    finally:
        if old is not None:
            shutil.rmtree(old, ignore_errors=True)

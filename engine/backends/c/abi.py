"""The kernel ABI as the Python side sees it, read from csrc/ss_abi.h (its one source).

The header's CDEF-BEGIN / CDEF-END part holds the event and status codes
(``#define SS_...``), the ``ss_event`` / ``ss_counters`` structs and the
entry points every kernel exports.  This module reads it once at import:
:data:`CDEF` is that part without the ``#define`` lines (the cffi cdef
every kernel module is built with), :data:`CONSTANTS` maps each ``SS_*``
name to its integer value and :data:`EVENT_CODES` the event names
(``"NOTE_ON"`` ...) to their codes.  The event vocabulary itself belongs to
the IR (engine.ir.voicing.EVENT_CODES and its ``EV_*`` values); the import
checks the header agrees with it and raises BuildError naming the first
difference, or when the header is malformed.
"""

from __future__ import annotations

import re

from sheafsynth.engine.errors import BuildError
from sheafsynth.engine.ir import voicing
from sheafsynth.engine.locations import CSRC_DIR

__all__ = ["ABI_HEADER", "CDEF", "CONSTANTS", "EVENT_CODES", "ENTRY_POINTS", "SS_OK", "SS_ERR_FRAMES",
           "SS_ERR_STATE", "cdef_part", "parse_abi", "read_cdef_part"]

ABI_HEADER = CSRC_DIR / "ss_abi.h"

#: Functions a kernel module exports (csrc/ss_kernel_pool.h defines them).
ENTRY_POINTS = ("sheafsynth_state_size", "sheafsynth_init", "sheafsynth_render", "sheafsynth_set_limiter",
                "sheafsynth_set_param_now", "sheafsynth_set_ramp", "sheafsynth_get_param", "sheafsynth_voices")

_DEFINE = re.compile(r"^\s*#\s*define\s+(SS_[A-Z0-9_]+)\s+(-?\d+)\b", re.M)


def cdef_part(text: str, where: str) -> str:
    """The declarations between a header's ``/* CDEF-BEGIN */`` and ``/* CDEF-END */`` markers.

    That part is plain C declarations and integer ``#define`` lines that cffi's
    cdef reads as they are; BuildError naming ``where`` when a marker is missing.
    """
    try:
        return text.split("/* CDEF-BEGIN */", 1)[1].split("/* CDEF-END */", 1)[0]
    except IndexError:
        raise BuildError(f"{where} lacks its CDEF-BEGIN / CDEF-END markers") from None


def read_cdef_part(name: str) -> str:
    """:func:`cdef_part` of the shipped header ``csrc/<name>``."""
    path = CSRC_DIR / name
    try:
        text = path.read_text(encoding="utf-8")
    except OSError as exc:
        raise BuildError(f"cannot read {path}: {exc.strerror}") from None
    return cdef_part(text, f"csrc/{name}")


def parse_abi(text: str, where: str = "csrc/ss_abi.h") -> tuple[str, dict[str, int]]:
    """(cdef text, SS_* constants) of an ABI header's text; BuildError if it is malformed."""
    part = cdef_part(text, where)
    consts: dict[str, int] = {}
    for name, value in _DEFINE.findall(part):
        if name in consts:
            raise BuildError(f"{where} defines {name} twice")
        consts[name] = int(value)
    cdef = "\n".join(ln for ln in part.splitlines() if not ln.lstrip().startswith("#"))
    for needed in ("typedef struct ss_event", "typedef struct ss_counters") + ENTRY_POINTS:
        if needed not in cdef:
            raise BuildError(f"{where}: the CDEF part lacks {needed!r}")
    for name in ("SS_OK", "SS_ERR_FRAMES", "SS_ERR_STATE"):
        if name not in consts:
            raise BuildError(f"{where} does not define {name}")
    return cdef, consts


def _event_codes(consts: dict[str, int], where: str) -> dict[str, int]:
    codes = {name[len("SS_EV_"):]: v for name, v in consts.items() if name.startswith("SS_EV_")}
    if len(set(codes.values())) != len(codes):
        raise BuildError(f"{where}: two event types share a code")
    ir = voicing.EVENT_CODES
    if codes != ir:
        diff = sorted(set(codes.items()) ^ set(ir.items()))
        raise BuildError(f"{where} and engine.ir.voicing disagree on event codes: {diff[0]}")
    return codes


try:
    _TEXT = ABI_HEADER.read_text(encoding="utf-8")
except OSError as exc:
    raise BuildError(f"cannot read the kernel ABI header {ABI_HEADER}: {exc.strerror}") from None

CDEF, CONSTANTS = parse_abi(_TEXT)
EVENT_CODES: dict[str, int] = _event_codes(CONSTANTS, "csrc/ss_abi.h")
SS_OK: int = CONSTANTS["SS_OK"]
SS_ERR_FRAMES: int = CONSTANTS["SS_ERR_FRAMES"]
SS_ERR_STATE: int = CONSTANTS["SS_ERR_STATE"]

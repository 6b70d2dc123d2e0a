"""The kernel's flush-to-zero mode stays inside its calls.

sheafsynth_render (csrc/ss_kernel_pool.h) and ss_host_process
(csrc/host_rt.c) switch the x86 MXCSR (or AArch64 FPCR) to flush-to-zero /
denormals-are-zero for the audio arithmetic; run on the main thread they
must hand the caller its own mode back, or every later NumPy / Python
computation loses subnormal numbers.  Reference: IEEE 754-2008 §3.4 (the
smallest positive subnormal binary64 value is 2**-1074, which numpy.finfo
reports as ``smallest_subnormal``).
"""

from __future__ import annotations

import numpy as np

from sheafsynth.engine.instrument import Instrument
from sheafsynth.engine.locations import FACTORY_DIR
from sheafsynth.host.live.runtime import HostRuntime

TINY = np.finfo(np.float64).smallest_subnormal          # 2**-1074 (IEEE 754 binary64)
TINY32 = np.finfo(np.float32).smallest_subnormal        # 2**-149 (IEEE 754 binary32)


def _subnormals_survive() -> bool:
    a = np.array([TINY], dtype=np.float64)
    b = np.array([TINY32], dtype=np.float32)
    # under DAZ a subnormal operand reads as 0; under FTZ a subnormal result is written as 0
    return bool((a * 1.0)[0] != 0.0 and (b * np.float32(1.0))[0] != 0.0
                and (np.float64(2.0 ** -1022) / 2.0) != 0.0)


def test_kernel_render_restores_the_callers_fp_mode():
    assert _subnormals_survive()
    inst = Instrument(str(FACTORY_DIR / "porch-pluck.json"), rate=48000, max_block=64)
    inst.note_on(60, 100)
    out = inst.process(64)
    assert np.all(np.isfinite(out))
    assert _subnormals_survive()


def test_host_process_restores_the_callers_fp_mode():
    assert _subnormals_survive()
    rt = HostRuntime(48000, 64, 1)
    out = rt.process(64, 1_000_000)
    assert out.shape == (64, 1)
    assert _subnormals_survive()

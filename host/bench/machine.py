"""The ``machine`` entry of the bench report: CPU, cores, compiler and flags, library versions.
"""

from __future__ import annotations

import os
import platform
import shlex
import shutil
import subprocess
import sysconfig

import cffi
import numpy as np
import scipy

from sheafsynth.engine.backends.c.build import BASE_FLAGS

__all__ = ["machine_info"]


def _compiler_argv() -> list[str]:
    cc = os.environ.get("CC") or sysconfig.get_config_var("CC") or "cc"
    argv = shlex.split(cc)
    if not argv or shutil.which(argv[0]) is None:
        argv = ["cc"]
    return argv


def machine_info() -> dict:
    """CPU model, cores, compiler and flags, Python and library versions, load average at start."""
    cpu = platform.processor() or platform.machine()
    try:
        with open("/proc/cpuinfo", encoding="utf-8", errors="replace") as fh:
            for line in fh:
                if line.startswith("model name"):
                    cpu = line.split(":", 1)[1].strip()
                    break
    except OSError:
        pass
    cc = _compiler_argv()
    try:
        res = subprocess.run(cc + ["--version"], capture_output=True, text=True, timeout=30,
                             stdin=subprocess.DEVNULL)
        ident = ((res.stdout or res.stderr).splitlines() or ["unknown"])[0].strip()
    except (OSError, subprocess.SubprocessError):
        ident = "unknown"
    try:
        load = [round(x, 2) for x in os.getloadavg()]
    except OSError:
        load = None

    return {"cpu": cpu, "cores": os.cpu_count(), "arch": platform.machine(),
            "compiler": f"{' '.join(cc)}: {ident}", "flags": " ".join(BASE_FLAGS),
            "python": platform.python_version(), "numpy": np.__version__, "scipy": scipy.__version__,
            "cffi": cffi.__version__, "loadavg_at_start": load}

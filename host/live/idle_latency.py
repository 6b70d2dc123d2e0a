"""Keep the CPUs out of slow idle states while playing (Linux PM QoS).

A CPU that has gone idle takes time to wake again; on laptops and virtual
machines that can be a large part of a small audio block, and a real-time
thread woken on such a CPU starts late.  Writing a 32-bit 0 to
/dev/cpu_dma_latency and keeping the file open asks the kernel to use only
idle states that wake at once (Linux kernel documentation, "PM Quality Of
Service Interface", cpu_dma_latency); closing the file drops the request.
It costs power while held, so it is opt-in (``play --shallow-idle``), and it
needs the right to open that file (usually root).
"""

from __future__ import annotations

import os
import struct

__all__ = ["ShallowIdle", "QOS_PATH"]

QOS_PATH = "/dev/cpu_dma_latency"


class ShallowIdle:
    """Hold a 0 µs CPU wake-up latency request while open (a context manager).

    ``held`` says whether the request is in force; ``reason`` why not.  Never
    raises: not being allowed to tune the machine is not an error.
    """

    def __init__(self, path: str = QOS_PATH):
        self.path = path
        self.held = False
        self.reason = ""
        self._fd: int | None = None

    def open(self) -> "ShallowIdle":
        """Try to hold the CPUs out of slow idle states; ``held`` and ``reason`` say how it went."""
        if self._fd is not None:
            return self
        try:
            fd = os.open(self.path, os.O_WRONLY)
        except FileNotFoundError:
            self.reason = f"{self.path} does not exist (not Linux, or no PM QoS)"
            return self
        except PermissionError:
            self.reason = f"not allowed to open {self.path} (needs root, or a udev rule granting it)"
            return self
        except OSError as exc:
            self.reason = f"cannot open {self.path}: {exc.strerror or exc}"
            return self
        try:
            os.write(fd, struct.pack("=i", 0))
        except OSError as exc:
            os.close(fd)
            self.reason = f"cannot write {self.path}: {exc.strerror or exc}"
            return self
        self._fd, self.held, self.reason = fd, True, ""
        return self

    def close(self) -> None:
        """Let the CPUs sleep deeply again."""
        if self._fd is not None:
            os.close(self._fd)
            self._fd = None
        self.held = False

    def __enter__(self) -> "ShallowIdle":
        return self.open()

    def __exit__(self, *exc) -> None:
        self.close()

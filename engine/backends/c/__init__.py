"""sheafsynth.engine.backends.c: the kernel ABI (abi.py), C text per block kind
(emitters/), the kernel generator (emit.py) and the cffi build cache (build.py)."""

__all__: list[str] = []

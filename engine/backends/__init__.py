"""sheafsynth.engine.backends: consumers of the step program that run it.

c/ generates, compiles and loads the C kernel; reference/ is the slow NumPy
stepper the kernel is tested against.  Backends never import engine.analysis."""

__all__: list[str] = []

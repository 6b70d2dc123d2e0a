"""sheafsynth.engine.backends.reference: the NumPy reference stepper (stepper.py) and
the one Python field update (field.py); the living definition of the step program."""

__all__: list[str] = []

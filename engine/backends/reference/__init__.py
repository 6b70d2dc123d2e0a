"""sheafsynth.engine.backends.reference."""

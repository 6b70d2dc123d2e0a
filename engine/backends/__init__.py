"""sheafsynth.engine.backends."""

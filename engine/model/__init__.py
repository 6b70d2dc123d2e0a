"""sheafsynth.engine.model."""

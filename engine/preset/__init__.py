"""sheafsynth.engine.preset."""

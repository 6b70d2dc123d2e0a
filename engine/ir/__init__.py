"""sheafsynth.engine.ir."""

"""sheafsynth.engine.analysis."""

"""sheafsynth.engine.backends.c."""

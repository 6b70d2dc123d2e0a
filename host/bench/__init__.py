"""sheafsynth.host.bench."""

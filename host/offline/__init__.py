"""sheafsynth.host.offline."""

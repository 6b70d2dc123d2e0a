"""sheafsynth.host.live."""

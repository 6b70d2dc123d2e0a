"""sheafsynth.host.commands."""

"""sheafsynth host: command line, offline render, live audio and MIDI."""

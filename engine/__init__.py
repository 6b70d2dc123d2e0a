"""sheafsynth engine: presets, sheaf model, lowering, C generation, analysis.

The engine never imports the host package.
"""

__version__ = "0.1.0"

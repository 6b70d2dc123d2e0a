"""sheafsynth.engine.analysis: sparse assembly, spectra, gains and storage certificates, modes, the check report.

Import the modules themselves (for example ``sheafsynth.engine.analysis.report``);
this package re-exports nothing.
"""

__all__: list[str] = []

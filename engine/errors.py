"""The project's exception family: every user-facing failure is one of these."""

__all__ = ["SheafsynthError", "PresetError", "UnstableError", "InputError", "BuildError", "AudioError",
           "AnalysisError", "NotDecided", "PlotUnavailable"]

class SheafsynthError(Exception):
    """Base class: the CLI turns any of these into a one-line message."""


class PresetError(SheafsynthError):
    """A preset is malformed; the message starts with the JSON path at fault."""

    def __init__(self, message: str, path: str = ""):
        self.path = path
        self.problem = message
        super().__init__(f"{path}: {message}" if path else message)


class UnstableError(PresetError):
    """The preset has a growing or undamped mode at some corner of its knob box."""


class InputError(SheafsynthError):
    """A bad argument or input file other than a preset (MIDI file, option)."""


class BuildError(SheafsynthError):
    """Generated C failed to compile or load."""


class AudioError(SheafsynthError):
    """The audio device could not be opened or failed while running."""


class AnalysisError(SheafsynthError):
    """The analysis was given unusable input or could not complete."""


class PlotUnavailable(SheafsynthError):
    """matplotlib (the plot extra) is not installed; the message says how to get it."""


class NotDecided(AnalysisError):
    """The analysis reached its deadline before it could prove or refute stability.

    ``limit_s`` is the time limit in s, ``step`` the step it was in, ``hint``
    (optional) the way forward, added to the message after a semicolon.
    """

    def __init__(self, limit_s: float, step: str, hint: str = ""):
        self.limit_s = limit_s
        self.step = step
        text = f"stability neither proven nor refuted within {limit_s:g} s (stopped at: {step})"
        super().__init__(f"{text}; {hint}" if hint else text)


"""Offline rendering: notes and MIDI files to WAV through the live block loop (:mod:`.render`)."""

__all__: list[str] = []

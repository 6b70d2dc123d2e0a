"""``sheafsynth ports``: the audio outputs (``--device``) and MIDI inputs (``--midi-in``) this machine offers."""

from __future__ import annotations

import argparse
import json

from sheafsynth.engine.errors import AudioError, InputError
from sheafsynth.host.commands.shared import Command
from sheafsynth.host.live.audio import list_audio_devices
from sheafsynth.host.live.midi import MidiError, available_apis, list_midi_inputs

__all__ = ["COMMAND", "list_ports"]


def list_ports() -> dict:
    """{"audio": [device dicts, rate in Hz], "audio_error": text or None, "midi": {api: {"inputs", "error"}}}."""
    result: dict = {"audio": [], "audio_error": None, "midi": {}}
    try:
        result["audio"] = [dict(index=d.index, name=d.name, hostapi=d.hostapi,
                                channels=d.max_output_channels, rate=d.default_samplerate,
                                default=d.is_default) for d in list_audio_devices()]
    except AudioError as exc:
        result["audio_error"] = str(exc)
    for api in available_apis():
        try:
            result["midi"][api] = {"inputs": list_midi_inputs(api), "error": None}
        except (MidiError, InputError) as exc:
            result["midi"][api] = {"inputs": [], "error": str(exc)}
    return result


def _add(p: argparse.ArgumentParser) -> None:
    p.add_argument("--json", action="store_true", help="machine-readable listing")


def _run(args: argparse.Namespace) -> int:
    result = list_ports()
    if args.json:
        print(json.dumps(result, indent=2))
        return 0
    print("Audio outputs (--device):")
    if result["audio_error"]:
        print(f"  not available: {result['audio_error']}")
    elif not result["audio"]:
        print("  none")
    for d in result["audio"]:
        print(f"  {d['index']:>3}  {d['name']}  ({d['hostapi']}, {d['channels']} ch, {d['rate']:g} Hz)"
              + ("  [default]" if d["default"] else ""))
    for api, m in result["midi"].items():
        print(f"MIDI inputs via {api} (--midi-in, --midi-api {api}):")
        if m["error"]:
            print(f"  not available: {m['error']}")
        elif not m["inputs"]:
            print("  none")
        for name in m["inputs"]:
            print(f"       {name}")
    return 0


COMMAND = Command("ports", "list audio output devices and MIDI inputs", _add, _run)

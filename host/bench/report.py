"""The bench report's keys, goals and the table people read.

Speed goals are reported (``goals``), never asserted.
"""

from __future__ import annotations

from sheafsynth.host.bench.context import PLAIN_PRESET

__all__ = ["KEYS", "GOALS", "goals_met", "format_table"]

KEYS = ("generated_vs_handwritten", "speedup_vs_lfilter", "speedup_vs_reference", "voices_at_half_core",
        "torus4096_realtime_factor", "field_vs_handwritten", "host_overhead_us_per_block",
        "compile_cold_s", "load_warm_s", "denormal_tail_ratio", "bake_two_vs_one_workers", "machine")

# key -> (comparison, bound); voices_at_half_core applies to the plain preset
GOALS: dict[str, tuple[str, float]] = {
    "generated_vs_handwritten": ("<=", 1.25),
    "speedup_vs_lfilter": (">=", 30.0),
    "speedup_vs_reference": (">=", 100.0),
    "voices_at_half_core": (">=", 2000.0),
    "torus4096_realtime_factor": (">=", 8.0),
    "field_vs_handwritten": ("<=", 1.25),
    "host_overhead_us_per_block": ("<=", 50.0),
    "compile_cold_s": ("<=", 3.0),
    "load_warm_s": ("<=", 0.1),
    "denormal_tail_ratio": ("<=", 1.5),
    "bake_two_vs_one_workers": ("<=", 0.6),
}


def goals_met(report: dict) -> dict:
    """For every goal: {"goal": "<= 1.25", "value", "met" (None when not measured)}."""
    out = {}
    for key, (op, bound) in GOALS.items():
        v = report.get(key)
        if key == "voices_at_half_core":
            v = (v or {}).get(PLAIN_PRESET)
        met = None if v is None else (v <= bound if op == "<=" else v >= bound)
        out[key] = {"goal": f"{op} {bound:g}", "value": v, "met": met}
    out["voices_at_half_core"]["preset"] = PLAIN_PRESET
    return out


_LABELS = {
    "generated_vs_handwritten": ("generated / hand-written time", ""),
    "speedup_vs_lfilter": ("speed-up vs scipy lfilter", "x"),
    "speedup_vs_reference": ("speed-up vs reference stepper", "x"),
    "torus4096_realtime_factor": ("64x64 torus, real-time factor", "x"),
    "field_vs_handwritten": ("torus: generated / hand-written", ""),
    "host_overhead_us_per_block": ("host overhead per block", "us"),
    "compile_cold_s": ("cold compile", "s"),
    "load_warm_s": ("warm load", "s"),
    "denormal_tail_ratio": ("deep-tail block / first block", ""),
    "bake_two_vs_one_workers": ("bake 24 takes: 2 workers / 1 worker", ""),
}



def _spread_of(details: dict, key: str) -> dict | None:
    """The first spread dict among a measurement's details, or None."""
    d = details.get(key) or {}
    for v in d.values():
        if isinstance(v, dict) and "median" in v and "q1" in v:
            return v
    return None


def format_table(rep: dict) -> str:
    """The report as a table for people (medians, quartiles, goals)."""
    m = rep["machine"]
    lines = [f"sheafsynth bench ({rep['mode']}, {rep['reps']} reps, {rep['elapsed_s']:.0f} s)",
             f"machine: {m['cpu']}, {m['cores']} cores; {m['compiler']}; {m['flags']}", ""]
    head = f"{'measurement':<42} {'median':>10} {'q1 .. q3':>22} {'goal':>10}  met"
    lines += [head, "-" * len(head)]
    goals = rep["goals"]

    def row(label, v, unit, sp, goal, met):
        val = "n/a" if v is None else f"{v:.4g}{unit}"
        rng = "" if not sp or sp.get("q1") is None else f"{sp['q1']:.4g} .. {sp['q3']:.4g}"
        flag = "-" if met is None else ("yes" if met else "NO")
        lines.append(f"{label:<42} {val:>10} {rng:>22} {goal:>10}  {flag}")

    for key in KEYS:
        if key == "machine":
            continue
        if key == "voices_at_half_core":
            vs = rep[key] or {}
            det = ((rep["details"].get(key) or {}).get("presets")) or {}
            if not vs:
                row("voices at half a core", None, "", None, goals[key]["goal"], None)
            for name, v in vs.items():
                g = goals[key]["goal"] if name == PLAIN_PRESET else ""
                met = goals[key]["met"] if name == PLAIN_PRESET else None
                row(f"voices at half a core: {name}", v, "", (det.get(name) or {}).get("voices"), g, met)
            continue
        label, unit = _LABELS[key]
        row(label, rep[key], unit, _spread_of(rep["details"], key), goals[key]["goal"], goals[key]["met"])
        det = rep["details"].get(key) or {}
        if key == "generated_vs_handwritten" and isinstance(det.get("ratio_vs_bend_ready_rings"), dict):
            sp = det["ratio_vs_bend_ready_rings"]
            row("  ... hand-written with bend-ready rings", sp.get("median"), "", sp, "", None)
        if key == "torus4096_realtime_factor" and isinstance(det.get("single_precision"), dict):
            sp = det["single_precision"].get("realtime_factor") or {}
            row("  ... the same torus, float32 state", sp.get("median"), "x", sp, "", None)
        if key == "torus4096_realtime_factor" and isinstance(det.get("largest_field_preset"), dict):
            fp = det["largest_field_preset"]
            sp = fp.get("realtime_factor") or {}
            row(f"  ... largest field preset {fp.get('preset')}", sp.get("median"), "x", sp, "", None)
    if rep["notes"]:
        lines.append("")
        for key, text in rep["notes"].items():
            lines.append(f"note: {key}: {text}")
    return "\n".join(lines)

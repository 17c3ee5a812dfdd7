"""Exported protection settings as a C header for firmware (text only, no computation)."""

from __future__ import annotations

from typing import Any

from phaseward.api.schemas.common import CAUTION

# (macro stem, setting, unit suffix): levels and release levels as doubles, times as integer
# nanoseconds (the rehearsal's clock)
_RULES = (
    ("OC", "oc_level_a", "oc_release_a", "oc_debounce_s", "A"),
    ("OT", "ot_level_c", "ot_release_c", "ot_debounce_s", "C"),
    ("IMBALANCE", "imbalance_pct", "imbalance_release_pct", "imbalance_debounce_s", "PCT"),
    ("DEAD", "dead_floor_a", "dead_release_a", "dead_debounce_s", "A"),
    ("UV", "uv_level_v", "uv_release_v", "uv_debounce_s", "V"),
)


def _ns(seconds: float | None) -> str:
    return f"{round((seconds or 0.0) * 1e9)}LL"


def c_header(export: dict[str, Any]) -> str:
    """The export of :func:`phaseward.monitor.rehearsals.export` as a C99 header.

    A rule without a level is ``..._ENABLED 0``; a rule without hysteresis releases at its
    level (``..._RELEASE_x`` equals ``..._LEVEL_x``).
    """
    s, fig, src = export["settings"], export["figures"], export["trace"]
    where = (
        f'trace {src["trace_id"]} "{src["name"]}"'
        if src.get("trace_id") is not None
        else f"rail {src['rail_id']}, samples {src['since']} .. {src['until']} s"
    )
    worst = fig["max_latency_s"]
    missing = export["missing"]
    lines = [
        "/* Protection settings exported by phaseward.",
        f" * rail: {src.get('rail_id') or 'not recorded (uploaded trace)'}",
        f" * rehearsed on: {where}".replace("*/", "* /"),
        f" * exported: {export['exported']} from rehearsal {export['rehearsal_id']}, "
        f"row {export['row']}",
        f" * figures: {fig['trips']} trips, {fig['false_trips']} false, {fig['missed']} of "
        f"{len(export['labels'])} labelled faults missed, worst latency "
        f"{'n/a (a fault missed)' if worst is None else f'{worst:.9g} s'}",
        f" * missing readings: {missing['policy']}"
        + (f" up to {missing['hold_s']:g} s" if missing["policy"] == "hold" else ""),
        f" * {CAUTION}",
        " */",
        "#ifndef PHASEWARD_PROTECTION_H",
        "#define PHASEWARD_PROTECTION_H",
        "",
    ]
    for stem, level, release, debounce, unit in _RULES:
        on = s[level] is not None
        lines.append(f"#define PW_{stem}_ENABLED {int(on)}")
        if on:
            rel = s[release] if s[release] is not None else s[level]
            lines += [
                f"#define PW_{stem}_LEVEL_{unit} ({s[level]!r})",
                f"#define PW_{stem}_RELEASE_{unit} ({rel!r})",
                f"#define PW_{stem}_DEBOUNCE_NS {_ns(s[debounce])}",
            ]
    blank = s["step_a"] is not None and (s["blanking_s"] or 0.0) > 0.0
    lines += [
        f"#define PW_IMBALANCE_MIN_LOAD_A ({s['imbalance_min_load_a']!r})",
        f"#define PW_DEAD_OTHERS_MIN_A ({s['dead_others_min_a']!r})",
        f"#define PW_BLANKING_ENABLED {int(blank)}",
    ]
    if blank:
        lines += [
            f"#define PW_BLANKING_NS {_ns(s['blanking_s'])}",
            f"#define PW_BLANKING_STEP_A ({s['step_a']!r})",
        ]
    lines += ["", "#endif /* PHASEWARD_PROTECTION_H */", ""]
    return "\n".join(lines)

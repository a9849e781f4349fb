"""Words for people instead of the detector's keys and codes: alarm kinds, subjects
(features, sensor checks, mode and excitation pairs) and the evidence of an alarm as rows
of a table, each value rounded to what it means and given its unit.

The one table of words the alarm pages, the machine page's alarm history and the CSV
export use. The API and MQTT keep the keys (integrators read those; docs/api.md).
Unknown keys still read as words (underscores as spaces), so a key added to the evidence
later shows, if plainly, before it has its own entry here.
"""

from __future__ import annotations

import math
import re
from collections.abc import Callable, Mapping
from typing import Any, NamedTuple

#: Alarm kinds (monitor/detection/alarms.py ``KINDS``) as words.
KIND_WORDS: dict[str, str] = {
    "resonance_proximity": "excitation near a resonance",
    "amplitude_growth": "vibration growing",
    "mode_shift": "natural frequency shifted",
    "sensor_fault": "sensor fault",
    "processing_fault": "readings not processed",
}

#: Growth features (monitor/detection/features.py) as words; ``<n>x`` and bearing lines
#: are formed by :func:`feature_words`.
FEATURE_WORDS: dict[str, str] = {
    "overall": "overall velocity (10–1000 Hz)",
    "1x_norm": "1x amplitude per speed squared (speed-normalised 1x)",
}

#: Bearing defect frequencies, with the trade's abbreviations (common practice).
BEARING_WORDS: dict[str, str] = {
    "bpfo": "outer-race defect frequency (BPFO)",
    "bpfi": "inner-race defect frequency (BPFI)",
    "bsf": "rolling-element spin frequency (BSF)",
    "ftf": "cage frequency (FTF)",
}

#: Sensor health checks (monitor/detection/health.py ``CHECKS``) as words.
CHECK_WORDS: dict[str, str] = {
    "flat_line": "signal flat (sensor, cable or input dead)",
    "clipping": "signal clipped at the sensor's range",
    "spikes": "isolated spikes in the signal",
    "dropouts": "samples missing or zero",
    "sample_rate": "sample rate differs from the registry",
    "unit": "unit differs from the registry",
    "stale": "no readings arriving",
}

#: Subjects of ``processing_fault`` alarms (monitor/service/faults.py).
STREAM_WORDS: dict[str, str] = {
    "waveform": "waveform readings",
    "speed": "speed messages",
}

#: Levels and margin states.
LEVEL_WORDS: dict[str, str] = {
    "clear": "clear of the required band",
    "approach": "approaching the required band",
    "inside": "inside the required band",
    "below": "below the excitation",
    "above": "above the excitation",
}

_ORDER = re.compile(r"(\d+(?:\.\d+)?)x")


def kind_words(kind: str | None) -> str:
    """An alarm kind as words (the key with spaces when it has no entry)."""
    if not kind:
        return "–"
    return KIND_WORDS.get(kind, kind.replace("_", " "))


def excitation_words(label: str) -> str:
    """An excitation label ('1x', '2.5x', '2xLF') as words."""
    if label == "2xLF":
        return "twice line frequency"
    m = _ORDER.fullmatch(label)
    if m is None:
        return label.replace("_", " ")
    n = float(m.group(1))
    if n == 1:
        return "1x (running speed)"
    return f"{m.group(1)}x ({m.group(1)} times running speed)"


def feature_words(name: str) -> str:
    """A growth feature ('overall', '1x', '1x_norm', '7x', 'bearing_bpfo') as words."""
    if name in FEATURE_WORDS:
        return FEATURE_WORDS[name]
    if name.startswith("bearing_"):
        defect = name[len("bearing_"):]
        return "bearing " + BEARING_WORDS.get(defect, defect.replace("_", " ")) + " in the envelope spectrum"
    if _ORDER.fullmatch(name):
        return excitation_words(name) + " amplitude"
    return name.replace("_", " ")


def subject_words(kind: str | None, subject: str | None) -> str:
    """What an alarm is about, as words: a growth feature, a sensor check, a stream, a mode
    and the excitation near it (``'<mode>@<excitation>'``), or a mode whose natural
    frequency moved."""
    if not subject:
        return "–"
    if kind == "amplitude_growth":
        return feature_words(subject)
    if kind == "sensor_fault":
        return CHECK_WORDS.get(subject, subject.replace("_", " "))
    if kind == "processing_fault":
        return STREAM_WORDS.get(subject, subject.replace("_", " "))
    if kind == "resonance_proximity" and "@" in subject:
        mode, _, exc = subject.rpartition("@")
        return f"{excitation_words(exc)} near mode “{mode}”"
    if kind == "mode_shift":
        return f"mode “{subject}”"
    return subject.replace("_", " ")


def alarm_summary(kind: str | None, subject: str | None) -> str:
    """One line for an alarm: its kind and subject as words."""
    return f"{kind_words(kind)}: {subject_words(kind, subject)}"


# ----------------------------------------------------------------------------- values


def decimals_for(value: float, significant: int = 3) -> int:
    """Decimals that show ``value`` to ``significant`` significant digits (none for a
    value of that many integer digits or more)."""
    if value == 0 or not math.isfinite(value):
        return 0
    return max(0, significant - 1 - math.floor(math.log10(abs(value))))


def number(value: Any, decimals: int | None = None) -> str:
    """A number as text: ``decimals`` places, or three significant digits; '–' for None
    and the words for a value that is not finite."""
    if value is None:
        return "–"
    if isinstance(value, bool):
        return "yes" if value else "no"
    if not isinstance(value, int | float):
        return str(value)
    if isinstance(value, int) and decimals is None:
        return str(value)
    v = float(value)
    if math.isnan(v):
        return "not a number"
    if math.isinf(v):
        return "infinite" if v > 0 else "minus infinite"
    places = decimals_for(v) if decimals is None else decimals
    return f"{v:,.{places}f}"


def level(value: Any, unit: str | None) -> str:
    """A vibration level or other feature value in its unit: mm/s to two decimals (the
    resolution ISO 20816 zone boundaries are given to) unless smaller, anything else to
    three significant digits."""
    if value is None:
        return "–"
    u = (unit or "").replace("Hz^2", "Hz²")
    if isinstance(value, int | float) and u.startswith("mm/s") and abs(value) >= 0.1:
        return f"{number(value, 2)} {u}"
    return f"{number(value)} {u}".strip()


def hz(value: Any) -> str:
    """A frequency, Hz to two decimals."""
    return "–" if value is None else f"{number(value, 2)} Hz"


def pct(value: Any) -> str:
    """A percentage to one decimal."""
    return "–" if value is None else f"{number(value, 1)} %"


def days(value: Any) -> str:
    """A number of days to one decimal."""
    return "–" if value is None else f"{number(value, 1)} days"


def duration(seconds: Any) -> str:
    """Seconds as people say them: '45 s', '12 min', '3 h 20 min', '2.5 days'."""
    if seconds is None:
        return "–"
    if not isinstance(seconds, int | float) or not math.isfinite(seconds):
        return number(seconds)
    s = float(seconds)
    if abs(s) < 90:
        return f"{s:.0f} s"
    if abs(s) < 5400:
        return f"{s / 60:.0f} min"
    if abs(s) < 2 * 86400:
        h, m = divmod(round(s / 60), 60)
        return f"{h} h {m} min" if m else f"{h} h"
    return days(s / 86400)


def speed(value: Any) -> str:
    """A running speed, Hz, with its r/min."""
    if not isinstance(value, int | float) or not math.isfinite(value):
        return number(value)
    return f"{number(value, 2)} Hz ({number(value * 60, 0)} r/min)"


def words(value: Any) -> str:
    """A level or status key as words."""
    if value is None:
        return "none"
    return LEVEL_WORDS.get(str(value), str(value).replace("_", " "))


# ----------------------------------------------------------------------------- evidence


class EvidenceRow(NamedTuple):
    """One line of an alarm's evidence: what (words) and its value as text."""

    label: str
    value: str


#: Keys shown elsewhere on the page or folded into another row (never a row of their own).
_FOLDED = frozenset({"name", "unit", "order", "limit_value", "time_to_limit_s", "spectrum_snapshot_id",
                     "spectra", "basis", "mode",
                     "hints"})  # likely causes: a list of their own on the evidence page


def _label(key: str) -> str:
    return key.replace("_", " ").capitalize()


def evidence_rows(evidence: Mapping[str, Any] | None, when: Callable[[Any], str]) -> list[EvidenceRow]:
    """The evidence of an alarm transition (the detector's JSON) as rows of label and value
    text, in a fixed order of the known keys, the others after them; ``when`` shows a time
    (the plant's time format). Spectra are left out (the page links them), and so are the
    likely-cause hints (the page lists them)."""
    ev = dict(evidence or {})
    unit = ev.get("unit")
    rows: list[EvidenceRow] = []

    def add(label: str, value: str) -> None:
        rows.append(EvidenceRow(label, value))

    formatters: dict[str, Callable[[Any], EvidenceRow | None]] = {
        "check": lambda v: EvidenceRow("Sensor check", CHECK_WORDS.get(v, words(v))),
        "message": lambda v: EvidenceRow("What was seen", str(v)),
        "cause": lambda v: EvidenceRow("Cause", str(v)),
        "comment": lambda v: EvidenceRow("Comment", str(v)),
        "until": lambda v: EvidenceRow("Shelved until", when(v)),  # a shelving step
        "speed_hz": lambda v: EvidenceRow("Running speed", speed(v)),
        "value": lambda v: EvidenceRow(f"Value of {feature_words(ev['name'])}" if ev.get("name") else "Value",
                                       level(v, unit)),
        "baseline_median": lambda v: EvidenceRow("Learned baseline (median)", level(v, unit)),
        "baseline_mad": lambda v: EvidenceRow("Baseline spread (median absolute deviation)", level(v, unit)),
        "baseline_status": lambda v: EvidenceRow("Baseline", str(v)),
        "ratio": lambda v: EvidenceRow("Value over baseline", "–" if v is None else f"{number(v, 2)} ×"),
        "trend_per_day": lambda v: EvidenceRow("Trend (Theil-Sen)", "–" if v is None else f"{level(v, unit)} per day"),
        "limit_name": lambda v: EvidenceRow("Limit watched", f"{v} = {level(ev.get('limit_value'), unit)}"),
        "time_to_limit_days": lambda v: EvidenceRow("Time to the limit at this trend",
                                                    "not approaching" if v is None else days(v)),
        "zone_limits_mm_s": lambda v: EvidenceRow(
            "ISO 20816 zone boundaries", ", ".join(f"{n} {number(x, 2)}" for n, x in zip(("A/B", "B/C", "C/D"), v, strict=False))
            + " mm/s RMS") if isinstance(v, list) else None,
        "raise_level": lambda v: EvidenceRow("Level this reading calls for", words(v)),
        "hold_level": lambda v: EvidenceRow("Level it holds", words(v)),
        "causes": lambda v: EvidenceRow("Why", "; ".join(map(str, v)) if v else "none"),
        "ignored_readings": lambda v: EvidenceRow(
            "Readings left out of growth", "none" if not v else "; ".join(f"{n} ({why})" for why, n in v.items()))
        if isinstance(v, dict) else None,
        "excitation": lambda v: EvidenceRow(f"Excitation near mode “{ev.get('mode')}”" if ev.get("mode") else "Excitation",
                                            excitation_words(str(v))),
        "mode_hz": lambda v: EvidenceRow("Natural frequency of the mode", hz(v)),
        "excitation_hz": lambda v: EvidenceRow("Excitation frequency", hz(v)),
        "margin_pct": lambda v: EvidenceRow("Separation margin (% of the mode frequency)", pct(v)),
        "side": lambda v: EvidenceRow("The mode lies", words(v)),
        "required_pct": lambda v: EvidenceRow(
            "Required margin" + (f", {ev['basis']}" if ev.get("basis") else ""), pct(v)),
        "approach_pct": lambda v: EvidenceRow("Approach band edge", pct(v)),
        "amplification_factor": lambda v: EvidenceRow("Amplification factor of the mode", number(v, 1)),
        "frequency_ratio": lambda v: EvidenceRow("Frequency ratio (excitation / mode)", number(v, 3)),
        "amplification": lambda v: EvidenceRow("Dynamic amplification at this ratio",
                                               "–" if v is None else f"{number(v, 2)} ×"),
        "in_half_power_band": lambda v: EvidenceRow("Inside the half-power band (the resonance peak)", number(bool(v))),
        "status": lambda v: EvidenceRow("Margin status", words(v)),
        "dwell_s": lambda v: EvidenceRow("Time in the band", "outside every band" if v is None else duration(v)),
        "required_dwell_s": lambda v: EvidenceRow("Dwell before an alarm is raised", duration(v)),
        "stored_hz": lambda v: EvidenceRow("Stored natural frequency", hz(v)),
        "identified_hz": lambda v: EvidenceRow("Identified natural frequency", hz(v)),
        "shift_pct": lambda v: EvidenceRow("Shift (% of the stored frequency)", pct(v)),
        "tolerance_pct": lambda v: EvidenceRow("Tolerance", pct(v)),
        "failures": lambda v: EvidenceRow("Failed readings in a row", number(v, 0)),
        "reading_id": lambda v: EvidenceRow("Reading", "none named (a speed message, or a reading without an id)" if v is None else str(v)),
    }
    for key, fmt in formatters.items():
        if key in ev:
            row = fmt(ev[key])
            if row is not None:
                rows.append(row)
    for key, v in ev.items():
        if key in formatters or key in _FOLDED:
            continue
        if key == "approach" and isinstance(v, dict):
            add("Forecast: band edge reached in", duration(v.get("seconds")))
            add("Forecast: band edge", hz(v.get("edge_hz")))
            add("Forecast: speed trend", "–" if v.get("speed_slope_hz_per_s") is None
                else f"{number(v['speed_slope_hz_per_s'] * 60)} Hz per minute")
        elif key.endswith(("_at", "_ts")) or key in ("ts", "now"):
            add(_label(key[:-3] if key.endswith(("_at", "_ts")) else key), when(v))
        elif key.endswith("_s") and isinstance(v, int | float):
            add(_label(key[:-2]), duration(v))
        elif key.endswith("_hz"):
            add(_label(key[:-3]), hz(v))
        elif key.endswith("_pct"):
            add(_label(key[:-4]), pct(v))
        else:
            add(_label(key), _plain(v))
    return rows


def _plain(v: Any) -> str:
    # Any other value: numbers to three significant digits, keys as words.
    if isinstance(v, dict):
        return "; ".join(f"{_label(str(k)).lower()}: {_plain(x)}" for k, x in v.items()) or "none"
    if isinstance(v, list | tuple):
        return "; ".join(_plain(x) for x in v) or "none"
    if isinstance(v, str):
        return v.replace("_", " ") if re.fullmatch(r"[a-z0-9_]+", v) else v
    return number(v)

"""Likely-cause hints: what the symptoms of a machine's readings suggest, in plain words.

Each rule reads :class:`~monitor.detection.symptoms.PointSymptoms` (one point's reading)
or the machine's margin table and gives at most one :class:`Hint` per cause and point:
the cause, the symptom that triggered it with its measured numbers and units, a
confidence (low, medium, high) with the rule that set it, what to check next, and the
published source of the symptom pattern. A hint supports qualified judgement; it is
never a diagnosis and never an order to act (:data:`CAUTION`).

The symptom patterns follow ISO 13373-3 (guidelines for vibration diagnosis) and the
machinery chapters of Harris' Shock and Vibration Handbook; bearing defect frequencies
come from the bearing kinematics (Randall and Antoni 2011); the resonance rule is the
separation-margin table (API 684) the service already computes. The numeric thresholds
below are rules of thumb of the trade, marked ``common practice`` (docs/diagnosis.md).
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any, Literal

from monitor.detection.symptoms import PointSymptoms
from monitor.model.bearing_geometry import DEFECTS

Confidence = Literal["low", "medium", "high"]
_RANK = {"low": 0, "medium": 1, "high": 2}

#: Shown with every list of hints (README.md, docs/diagnosis.md).
CAUTION = ("Hints say what the evidence suggests, to support qualified judgement; they are not a "
           "diagnosis. The machine's protection system, the manufacturer's limits, local codes "
           "and licensed practice prevail.")

ISO_13373_3 = ("ISO 13373-3:2015, Condition monitoring and diagnostics of machines - Vibration "
               "condition monitoring - Part 3: Guidelines for vibration diagnosis")
HARRIS = ("C. M. Harris and A. G. Piersol (eds.), Harris' Shock and Vibration Handbook, 5th ed., "
          "McGraw-Hill, 2002, vibration of rotating machinery")
RANDALL_ANTONI = ("R. B. Randall and J. Antoni, Rolling element bearing diagnostics - a tutorial, "
                  "Mechanical Systems and Signal Processing 25 (2011) 485-520")
API_684 = "API Standard 684, rotordynamic tutorial: separation margins"
ISO_20816_1 = ("ISO 20816-1:2016, evaluation zones (zone A newly commissioned, zone C unsatisfactory "
               "for long-term continuous operation)")

#: Unbalance: 1x carries at least this share of the overall velocity (RMS over RMS) at a
#: radial point (common practice: "1x dominant").
UNBALANCE_1X_SHARE = 0.7
#: ... or at least this share when the speed-normalised 1x is growing (common practice).
UNBALANCE_GROWING_SHARE = 0.5
#: Misalignment: 2x at least this fraction of 1x (common practice: 2x above half of 1x).
MISALIGNMENT_2X_RATIO = 0.5
#: Misalignment: an axial point's overall at least this fraction of the largest radial
#: overall of the machine (common practice: axial above half of radial).
MISALIGNMENT_AXIAL_SHARE = 0.5
#: Looseness: at least this many of the harmonics 2x-10x present (common practice: "a
#: series of harmonics"), each at least this fraction of 1x.
LOOSENESS_MIN_HARMONICS = 4
LOOSENESS_LINE_FRACTION = 0.1
#: Electrical: the line at twice the supply frequency at least this fraction of 1x, and
#: at least this many spectrum bins away from any whole order so it is not a harmonic of
#: speed (common practice: a Hann-windowed line spreads over about 4 bins, Harris 1978).
ELECTRICAL_2F_FRACTION = 0.5
ELECTRICAL_SEPARATION_BINS = 4.0
#: Bearing: an envelope line at least this far over the envelope floor makes a hint of
#: medium or high confidence; a line between the feature's noise clamp (15 dB,
#: monitor/detection/features.py) and this is low, and left out beside a stronger defect
#: line (BPFO = Z x FTF for a fixed outer race, so one defect lights others' lines;
#: Randall and Antoni 2011, section 2). Common practice.
BEARING_HINT_DB = 20.0
#: Flow: a vane or blade pass order at least as large as 1x (common practice).
PASS_TO_1X_RATIO = 1.0


@dataclass(frozen=True)
class Hint:
    """One likely cause.

    ``cause`` a stable identifier ('unbalance', 'misalignment', 'looseness',
    'bearing_bpfo', ..., 'electrical', 'flow', 'resonance'); ``title`` its words;
    ``point`` the point whose reading shows it (None for the machine); ``symptom`` the
    evidence with its numbers and units; ``confidence`` and ``confidence_rule`` (why that
    level); ``check_next`` what an engineer may check to confirm or rule it out;
    ``source`` the published source of the symptom pattern and its thresholds.
    """

    cause: str
    title: str
    point: str | None
    symptom: str
    confidence: Confidence
    confidence_rule: str
    check_next: str
    source: str

    def to_json(self) -> dict[str, Any]:
        return {"cause": self.cause, "title": self.title, "point": self.point, "symptom": self.symptom,
                "confidence": self.confidence, "confidence_rule": self.confidence_rule,
                "check_next": self.check_next, "source": self.source}


def _pct(x: float) -> str:
    return f"{100.0 * x:.0f} %"


def _of_1x(ratio: float) -> str:
    """A ratio to 1x in words: a percentage up to twice 1x, then times 1x."""
    return f"{_pct(ratio)} of 1x" if ratio < 2.0 else f"{ratio:.1f} times 1x"


def _mm(x: float) -> str:
    return f"{x:.2f} mm/s RMS"


def _where(ps: PointSymptoms) -> str:
    return f"at {ps.point} ({ps.direction})"


def _growth(ps: PointSymptoms, name: str) -> str:
    f = ps.features.get(name)
    if f is None or not f.growing:
        return ""
    ratio = f" is {f.ratio:.1f} times its baseline" if f.ratio is not None else " is growing"
    trend = f", trend {f.trend_per_day:+.3g} {f.unit} per day" if f.trend_per_day is not None else ""
    return f"; {name}{ratio}{trend}"


def _growing(ps: PointSymptoms, *names: str) -> bool:
    return any((f := ps.features.get(n)) is not None and f.growing for n in names)


def unbalance(ps: PointSymptoms) -> Hint | None:
    """1x dominant at a radial point with 2x small, in zone C or D or with 1x_norm growing."""
    one, two = ps.order_mm_s(1.0), ps.order_mm_s(2.0) or 0.0
    if ps.axial or not one or not ps.overall_mm_s_rms:
        return None
    share = one / ps.overall_mm_s_rms
    growing = _growing(ps, "1x_norm")
    if two >= MISALIGNMENT_2X_RATIO * one:
        return None
    dominant = share >= UNBALANCE_1X_SHARE
    if not ((dominant and ps.in_zone_c_or_d()) or (growing and share >= UNBALANCE_GROWING_SHARE)):
        return None
    high = dominant and growing
    return Hint(
        "unbalance", "Unbalance", ps.point,
        f"1x is {_mm(one)} at {ps.speed_hz:.2f} Hz {_where(ps)}, {_pct(share)} of the overall "
        f"{_mm(ps.overall_mm_s_rms)}; 2x is {_pct(two / one)} of 1x{_growth(ps, '1x_norm')}.",
        "high" if high else "medium",
        f"high when 1x is at least {_pct(UNBALANCE_1X_SHARE)} of the overall and 1x per speed squared "
        "grows against its baseline; medium when only one of the two holds.",
        "Worth checking: whether the 1x phase stays steady from reading to reading and differs by "
        "about 90 degrees between horizontal and vertical; build-up, erosion or missing parts on the "
        "rotor or impeller; the record of the last balancing.",
        f"{ISO_13373_3} (unbalance: 1x radial, steady phase; from memory); {HARRIS}; shares: "
        "common practice.")


def misalignment(ps: PointSymptoms) -> Hint | None:
    """2x at least half of 1x (in zone C or D or with 2x growing); at an axial point, a
    level in zone C or D dominated by 1x or 2x."""
    one, two = ps.order_mm_s(1.0), ps.order_mm_s(2.0)
    if not one or two is None:
        return None
    ratio = two / one
    significant = ps.in_zone_c_or_d() or _growing(ps, "2x")
    if not significant:
        return None
    if ps.axial:
        share = max(one, two) / ps.overall_mm_s_rms if ps.overall_mm_s_rms else 0.0
        if share < UNBALANCE_GROWING_SHARE:
            return None
        return Hint(
            "misalignment", "Misalignment", ps.point,
            f"Axial vibration {_where(ps)} is {_mm(ps.overall_mm_s_rms or 0.0)}, above the zone B/C boundary; 1x is "
            f"{_mm(one)}, 2x {_mm(two)} ({_of_1x(ratio)}){_growth(ps, '2x')}.",
            "high" if ratio >= MISALIGNMENT_2X_RATIO else "medium",
            "high when the axial level is in zone C or D with 2x at least "
            f"{_pct(MISALIGNMENT_2X_RATIO)} of 1x; medium when 1x alone dominates it.",
            _MISALIGNMENT_CHECK, _MISALIGNMENT_SOURCE)
    if ratio < MISALIGNMENT_2X_RATIO:
        return None
    return Hint(
        "misalignment", "Misalignment", ps.point,
        f"2x is {_mm(two)} at {2 * ps.speed_hz:.2f} Hz {_where(ps)}, {_of_1x(ratio)} "
        f"({_mm(one)}){_growth(ps, '2x')}.",
        "medium",
        f"medium when 2x is at least {_pct(MISALIGNMENT_2X_RATIO)} of 1x at a radial point; high "
        f"when an axial point also reads at least {_pct(MISALIGNMENT_AXIAL_SHARE)} of the radial level.",
        _MISALIGNMENT_CHECK, _MISALIGNMENT_SOURCE)


_MISALIGNMENT_CHECK = (
    "Worth checking: the shaft alignment of the coupling (offset and angle, hot and cold), the "
    "coupling's condition, soft foot, pipe strain; the phase across the coupling (near 180 degrees "
    "axially suggests angular misalignment).")
_MISALIGNMENT_SOURCE = (f"{ISO_13373_3} (misalignment: 2x and high axial vibration; from memory); "
                        f"{HARRIS}; ratios: common practice.")


def looseness(ps: PointSymptoms, pass_orders: Iterable[float] = ()) -> Hint | None:
    """A series of harmonics (at least 4 of 2x-10x, each 10 % of 1x) or half orders,
    in zone C or D (needs the velocity spectrum)."""
    one = ps.order_mm_s(1.0)
    if not one or not ps.in_zone_c_or_d() or not (ps.harmonics or ps.half_orders):
        return None
    skip = {float(o) for o in pass_orders}
    floor = LOOSENESS_LINE_FRACTION * one
    harmonics = [o for o, ln in ps.harmonics.items()
                 if ln.present and ln.mm_s_rms >= floor and all(abs(o - s) > 1e-6 for s in skip)]
    halves = [o for o, ln in ps.half_orders.items() if ln.present and ln.mm_s_rms >= floor]
    series = len(harmonics) >= LOOSENESS_MIN_HARMONICS
    if not (series or halves):
        return None
    words = []
    if harmonics:
        words.append(f"{len(harmonics)} harmonics of running speed ({', '.join(f'{o:g}x' for o in harmonics)})")
    if halves:
        words.append(f"half orders ({', '.join(f'{o:g}x' for o in halves)})")
    return Hint(
        "looseness", "Mechanical looseness", ps.point,
        f"The velocity spectrum {_where(ps)} shows {' and '.join(words)}, each at least "
        f"{_pct(LOOSENESS_LINE_FRACTION)} of 1x ({_mm(one)}) and clear of the noise; overall "
        f"{_mm(ps.overall_mm_s_rms or 0.0)}.",
        "high" if series and halves else "medium",
        f"high with both a series of at least {LOOSENESS_MIN_HARMONICS} harmonics and half orders; "
        "medium with one of them.",
        "Worth checking: the hold-down bolts, the base and grout for cracks, the fit of the bearing in "
        "its housing and on the shaft; the time waveform for clipped or impacting peaks once per "
        "revolution; phase differences between parts bolted together.",
        f"{ISO_13373_3} (mechanical looseness: harmonics and subharmonics of running speed; from "
        f"memory); {HARRIS}; counts and fractions: common practice.")


_DEFECT_WORDS = {"bpfo": "outer race (BPFO)", "bpfi": "inner race (BPFI)",
                 "bsf": "rolling element (BSF)", "ftf": "cage (FTF)"}


def bearing(ps: PointSymptoms) -> list[Hint]:
    """A defect frequency's envelope line clear of the envelope floor, with its stage."""
    out = []
    lines = {d: db for d in DEFECTS if (db := ps.bearing_db(d)) is not None}
    strong = any(db >= BEARING_HINT_DB for db in lines.values())
    for defect, db in lines.items():
        if strong and db < BEARING_HINT_DB:
            continue
        hz = ps.bearing_hz.get(defect)
        at = f" at {hz:.2f} Hz" if hz is not None else ""
        vel = ps.bearing_velocity.get(defect)
        stage3 = vel is not None and vel.present
        stage = ("stage 3: the defect frequency shows in the velocity spectrum too "
                 f"({_mm(vel.mm_s_rms)}, {vel.prominence_db:.0f} dB over its floor)" if stage3 and vel
                 else "stage 2: the defect lines show in the envelope spectrum only")
        growing = _growing(ps, f"bearing_{defect}")
        out.append(Hint(
            f"bearing_{defect}", f"Rolling-element bearing defect, {_DEFECT_WORDS[defect]}", ps.point,
            f"The envelope spectrum {_where(ps)} has a line at the {defect.upper()} defect frequency"
            f"{at} ({ps.speed_hz:.2f} Hz shaft speed), {db:.1f} dB over its floor{_growth(ps, f'bearing_{defect}')}; "
            f"{stage}.",
            "low" if db < BEARING_HINT_DB else "high" if growing else "medium",
            f"high when the line is at least {BEARING_HINT_DB:g} dB over the envelope floor and grows "
            f"against its baseline; medium when it is at least {BEARING_HINT_DB:g} dB; low below that.",
            "Worth checking: the harmonics of the defect frequency and their shaft-speed sidebands in "
            "the envelope spectrum, the bearing's lubrication and temperature, the bearing type fitted "
            "against the registry's geometry.",
            f"defect frequencies from the bearing kinematics and envelope analysis: {RANDALL_ANTONI}, "
            f"sections 2-3; {ISO_13373_3} (rolling-element bearings; from memory); stages: common "
            "practice."))
    return out


def electrical(ps: PointSymptoms) -> Hint | None:
    """On a motor: a line at twice the supply frequency, apart from the speed's
    harmonics, at least half of 1x, in zone C or D."""
    line, one, f_line = ps.line_2f, ps.order_mm_s(1.0), ps.line_frequency_hz
    if line is None or not f_line or not one or not line.present or not ps.in_zone_c_or_d():
        return None
    target = 2.0 * f_line
    nearest = round(target / ps.speed_hz) * ps.speed_hz
    if ps.resolution_hz is None or abs(nearest - target) < ELECTRICAL_SEPARATION_BINS * ps.resolution_hz:
        return None  # indistinguishable from a harmonic of running speed at this speed
    ratio = line.mm_s_rms / one
    if ratio < ELECTRICAL_2F_FRACTION:
        return None
    return Hint(
        "electrical", "Electrically induced vibration", ps.point,
        f"A line at twice the {f_line:g} Hz supply ({line.hz:.2f} Hz) {_where(ps)} is "
        f"{_mm(line.mm_s_rms)}, {_of_1x(ratio)}, {line.prominence_db:.0f} dB over its floor.",
        "high" if ratio >= 1.0 else "medium",
        "high when the twice-line-frequency line reaches 1x; medium from "
        f"{_pct(ELECTRICAL_2F_FRACTION)} of 1x.",
        "Worth checking: whether the line vanishes the moment the supply is cut while 1x coasts down; "
        "air-gap eccentricity, soft foot under the motor, supply voltage balance.",
        f"{ISO_13373_3} (electrically induced vibration at twice line frequency; from memory); "
        f"{HARRIS}; ratio: common practice.")


def flow(ps: PointSymptoms, pass_orders: Iterable[float]) -> Hint | None:
    """A vane or blade pass order at least as large as 1x, in zone C or D or growing."""
    one = ps.order_mm_s(1.0)
    if not one or not (ps.in_zone_c_or_d() or any(_growing(ps, f"{o:g}x") for o in pass_orders)):
        return None
    best = None
    for o in pass_orders:
        v = ps.order_mm_s(float(o))
        if v is not None and v >= PASS_TO_1X_RATIO * one and (best is None or v > best[1]):
            best = (float(o), v)
    if best is None:
        return None
    order, v = best
    label = f"{order:g}x"
    return Hint(
        "flow", "Flow or vane/blade pass excitation", ps.point,
        f"The pass order {label} ({order * ps.speed_hz:.1f} Hz) {_where(ps)} is {_mm(v)}, "
        f"{v / one:.1f} times 1x ({_mm(one)}){_growth(ps, label)}.",
        "high" if _growing(ps, label) else "medium",
        "high when the pass order also grows against its baseline; medium when it reaches 1x.",
        "Worth checking: the operating point against the best-efficiency flow, the gap between the "
        "vanes or blades and the cutwater, diffuser or casing; recirculation, cavitation or stall "
        "noise.",
        f"{ISO_13373_3} (hydraulic and aerodynamic excitation at vane/blade pass; from memory); "
        f"{HARRIS}; ratio: common practice.")


def resonance(margins: Sequence[Mapping[str, Any]], points: Sequence[PointSymptoms]) -> Hint | None:
    """The tightest excitation inside its required separation margin from a mode."""
    # rows as MarginRow.to_json writes them; a stored row missing a number takes no part
    inside = [r for r in margins if r.get("status") == "inside" and all(
        isinstance(r.get(k), int | float) for k in ("margin_pct", "required_pct", "excitation_hz", "mode_hz"))]
    if not inside:
        return None
    r = min(inside, key=lambda x: float(x["margin_pct"]) - float(x["required_pct"]))
    responding = [p for p in points if p.above_zone_a()]
    where = (f"; overall above zone A at {', '.join(p.point for p in responding)}" if responding else "")
    return Hint(
        "resonance", "Resonance: an excitation inside a mode's band", None,
        f"{r['excitation']} at {float(r['excitation_hz']):.2f} Hz lies {float(r['margin_pct']):.1f} % from "
        f"the mode '{r['mode']}' at {float(r['mode_hz']):.2f} Hz, inside the required "
        f"{float(r['required_pct']):.1f} %{where}.",
        "high" if responding else "medium",
        "high when an excitation is inside the required margin and a point's overall is above zone A; "
        "medium for the margin alone.",
        "Worth checking: the amplitude and phase of that order against speed in a run-up or coast-down "
        "(a peak with the phase turning through about 90 degrees confirms the mode), or an impact test "
        "at standstill; whether the mode's frequency in the registry is current.",
        f"{API_684} (as the margin table computes them); {ISO_13373_3} (resonance; from memory); "
        f"{ISO_20816_1}.")


def point_hints(ps: PointSymptoms, pass_orders: Iterable[float] = ()) -> list[Hint]:
    """Every hint one point's reading gives, in a fixed order of causes."""
    passes = tuple(float(o) for o in pass_orders if float(o) > 2.0)
    found = [unbalance(ps), misalignment(ps), looseness(ps, passes), *bearing(ps), electrical(ps),
             flow(ps, passes)]
    return [h for h in found if h is not None]


def machine_hints(points: Sequence[PointSymptoms], margins: Sequence[Mapping[str, Any]] = (),
                  excitation_orders: Iterable[float] = ()) -> list[Hint]:
    """The summary of a machine: each cause once (from the point where its confidence is
    highest, the first on a tie), misalignment raised to high when a radial and an axial
    point both show it, then resonance; strongest first."""
    orders = tuple(excitation_orders)
    best: dict[str, Hint] = {}
    misaligned: dict[bool, PointSymptoms] = {}
    by_point = {p.point: p for p in points}
    for ps in points:
        for h in point_hints(ps, orders):
            if h.cause == "misalignment":
                misaligned.setdefault(ps.axial, ps)
            if h.cause not in best or _RANK[h.confidence] > _RANK[best[h.cause].confidence]:
                best[h.cause] = h
    radial, axial = misaligned.get(False), misaligned.get(True)
    if radial is not None and axial is not None and radial.overall_mm_s_rms and axial.overall_mm_s_rms:
        share = axial.overall_mm_s_rms / radial.overall_mm_s_rms
        if share >= MISALIGNMENT_AXIAL_SHARE:
            h = best["misalignment"]
            other = axial if h.point != axial.point else radial
            best["misalignment"] = Hint(
                h.cause, h.title, h.point,
                f"{h.symptom} The axial level at {axial.point} is {_pct(share)} of the radial at "
                f"{radial.point} ({other.point} shows the pattern too).",
                "high", h.confidence_rule, h.check_next, h.source)
    if "unbalance" in best and any(r.get("status") == "inside" and r.get("order") == 1.0 for r in margins):
        # 1x amplified by a mode it sits in looks like unbalance without being one
        h = best["unbalance"]
        best["unbalance"] = Hint(
            h.cause, h.title, h.point,
            f"{h.symptom} 1x lies inside a mode's band, so the mode may amplify it.", "low",
            f"{h.confidence_rule} Low while 1x lies inside a mode's required margin.",
            h.check_next, h.source)
    out = sorted(best.values(), key=lambda h: -_RANK[h.confidence])
    res = resonance(margins, [p for p in by_point.values()])
    if res is not None:
        out.append(res)
        out.sort(key=lambda h: -_RANK[h.confidence])
    return out

"""``whirlwatch bumptest FILE``: natural frequencies and damping from an impact test.

FILE is a stream file (.jsonl): each waveform on ``{prefix}/{machine}/{point}/waveform``
is one hit (the whole decay in one block). Hits of the same point are averaged. With
``--force-point ID`` the waveforms of that point are the hammer (force) channel: each is
paired with the response waveforms of the same machine and timestamp and gives the H1
frequency response and its coherence; its ``unit`` may be ``N``, ``kN`` or ``lbf``. Each
hit is checked on the force channel (``monitor.modes.hits``): refused hits are left out
with a warning, and a point none of whose hits is usable is refused: one sentence naming
the file, the channels and what is wrong, exit status 1, no modes and no comparison.

FILE may also be a recording (.csv, .wav, .uff/.unv; docs/import-export.md): ``--machine``
names its machine, ``--point`` each channel (``--unit``, ``--calibration``), and each block
of ``--block-samples`` is one hit; its blocks go the same way as a stream file's lines.

Lines are validated by ``monitor.io.ingest.decode_message`` like live traffic, without the
age limits (a recording is old by nature). Without ``--machines`` every machine and point
of the file is accepted (the point's quantity taken from the unit of its first waveform).

With ``--record`` the stored modes come from the database (``--database`` or ``--config``)
and each comparison is recorded there as ``mode_shift`` alarms (monitor/service/mode_findings.py):
raised for a mode that moved beyond the tolerance, cleared when a later test finds it back.
"""

from __future__ import annotations

import dataclasses
import functools
import json
import math
import sys
from collections import defaultdict
from collections.abc import Callable, Iterable, Iterator
from pathlib import Path
from typing import Any

import click
import numpy as np

from monitor.commands.analyse import FILE_LIMITS, Outcome, count_lines, format_or_dash
from monitor.commands.db import database_options, open_store
from monitor.commands.import_recording import messages_of, recording_options, recording_waveforms
from monitor.commands.usage import usage_errors
from monitor.io.ingest import decode_message, parse_topic
from monitor.io.ingest_limits import Rejected
from monitor.io.recording_files import FORMATS as RECORDING_FORMATS
from monitor.io.streams import DEFAULT_PREFIX, StreamError, read_stream
from monitor.model import units, validate
from monitor.model.jsonsafe import jsonable
from monitor.model.readings import SpeedReading, Waveform
from monitor.model.registry import Machine, Point, Registry, RegistryError
from monitor.model.registry_file import load_registry
from monitor.model.timefmt import iso_utc
from monitor.modes.impact import BumpTest, ImpactRefused, bump_test
from monitor.modes.shift import (
    DEFAULT_SHIFT_TOLERANCE_PCT,
    ModeShift,
    check_tolerance_pct,
    compare_modes,
)

#: Force and response blocks pair when their timestamps differ by at most this, s.
PAIR_TOLERANCE_S = 1e-3
# Placeholder the force channel is decoded under (ingest knows vibration units only).
_FORCE_PLACEHOLDER = "m/s^2"


def _open_registry(machines_file: Path | None) -> Registry | None:
    if machines_file is None:
        return None
    if not machines_file.is_file():
        raise click.UsageError(f"machine registry {str(machines_file)!r} does not exist.")
    try:
        return load_registry(machines_file)
    except RegistryError as exc:
        raise click.ClickException(str(exc)) from exc


def _stored_registry(store: Any) -> Registry:
    """The database's registry; entries whose stored values lie outside the registry's
    bounds (left by an older release) are left out, each named on stderr."""
    from monitor.store.registry_sync import read_registry

    with store.session() as s:
        registry, problems = read_registry(s)
    for p in problems:
        click.echo(f"warning: {p}", err=True)
    if not registry.machines:
        raise click.ClickException(
            "the database holds no machines; import a registry with `whirlwatch machines import FILE`.")
    return registry


def comparison_registry(record: bool, machines_file: Path | None, database_url: str | None,
                        config_file: str | None) -> tuple[Registry | None, Any]:
    """The registry whose modes a test is compared with, and the store to record in: the
    database's registry and store with ``--record`` (the caller closes the store), else
    the ``--machines`` file's registry (None without one) and no store."""
    if not record:
        return _open_registry(machines_file), None
    if machines_file is not None:
        raise click.UsageError("--record compares with the modes stored in the database; leave out --machines.")
    store = open_store(database_url, config_file)
    try:
        return _stored_registry(store), store
    except BaseException:
        store.close()
        raise


def record_comparison(store: Any, machine: Machine, comparison: tuple[ModeShift, ...], ts: float,
                      point: str, evidence: dict[str, Any]) -> list[dict[str, Any]]:
    """Mode-shift alarm transitions of one point's comparison, recorded in ``store``, as
    alarm events (docs/schemas/alarm-event.json; none without a store)."""
    if store is None or not comparison:
        return []
    from monitor.service.mode_findings import record_mode_findings  # the store: only when asked

    return record_mode_findings(store, machine, comparison, ts, point=point, evidence=evidence)


def emit_point(doc: dict[str, Any] | None, print_table_fn: Callable[[], None],
               events: list[dict[str, Any]], *, recording: bool) -> None:
    """Write one point's result: ``doc`` as a JSON line (with its ``alarm_transitions``,
    alarm events as MQTT carries them, when recording), or the table and one line per
    recorded transition when ``doc`` is None."""
    if doc is not None:
        if recording:
            doc["alarm_transitions"] = [jsonable(e) for e in events]
        click.echo(json.dumps(doc, separators=(",", ":"), allow_nan=False))
        return
    print_table_fn()
    for e in events:
        click.echo(f"  recorded: mode_shift alarm {e['id']} ({e['ref']}) {e['transition']} ({e['severity']})")


def _with_point(registry: Registry, machine_id: str, point: Point | None) -> Registry:
    """``registry`` with ``machine_id`` (and ``point``) added when missing."""
    machines = list(registry.machines)
    for i, m in enumerate(machines):
        if m.id == machine_id:
            if point is None or any(p.id == point.id for p in m.points):
                return registry
            machines[i] = dataclasses.replace(m, points=(*m.points, point))
            return Registry(tuple(machines))
    return Registry((*machines, Machine(id=machine_id, points=() if point is None else (point,))))


def read_hits(
    path: Path,
    registry: Registry | None,
    *,
    prefix: str = DEFAULT_PREFIX,
    force_point: str | None = None,
    machine_id: str | None = None,
    outcome: Outcome,
    on_line: Callable[[], None] = lambda: None,
    messages: Iterable[tuple[str, bytes]] | None = None,
) -> tuple[dict[tuple[str, str], list[Waveform]], dict[str, list[tuple[Waveform, str]]], Registry]:
    """Waveforms of ``path`` by (machine, point), force blocks by machine (with their
    unit), and the registry used (``registry`` or one built from the file). ``messages``:
    the file's messages already made (a recording's, monitor/commands/import_recording.py)
    in place of the stream file's lines."""
    reg = registry if registry is not None else Registry()
    adhoc = registry is None
    hits: dict[tuple[str, str], list[Waveform]] = defaultdict(list)
    forces: dict[str, list[tuple[Waveform, str]]] = defaultdict(list)
    last_ts: dict[tuple[str, str], float] = {}

    def on_error(exc: StreamError) -> None:
        outcome.seen += 1
        outcome.reject("malformed_line", str(exc))
        on_line()

    source = messages if messages is not None else read_stream(path, on_error=on_error)
    for topic, payload in source:
        outcome.seen += 1
        on_line()
        try:
            m_id, p_id, _kind = parse_topic(topic, prefix)
        except Rejected as exc:
            outcome.reject(exc.reason, exc.detail)
            continue
        if machine_id is not None and m_id != machine_id:
            continue
        force_unit = None
        if p_id is not None and p_id == force_point:
            try:
                raw = json.loads(payload)
                force_unit = raw.get("unit") if isinstance(raw, dict) else None
            except ValueError:
                raw = None
            if isinstance(raw, dict) and force_unit in units.FORCE_UNITS:
                raw["unit"] = _FORCE_PLACEHOLDER
                payload = json.dumps(raw, separators=(",", ":")).encode("utf-8")
            reg = _with_point(reg, m_id, Point(p_id, quantity="acceleration",
                                               unit=_FORCE_PLACEHOLDER))
        elif adhoc and p_id is not None:
            try:
                unit = json.loads(payload).get("unit")
            except (ValueError, AttributeError):
                unit = None
            quantity = units.UNIT_QUANTITY.get(unit, "acceleration") if isinstance(unit, str) else (
                "acceleration")
            reg = _with_point(reg, m_id, Point(p_id, quantity=quantity,
                                               unit=units.BASE_UNIT[quantity]))
        elif adhoc:
            reg = _with_point(reg, m_id, None)
        try:
            reading = decode_message(
                topic, payload, reg, prefix=prefix, limits=FILE_LIMITS,
                last_ts=lambda m, p: last_ts.get((m, p)),
            )
        except Rejected as exc:
            outcome.reject(exc.reason, exc.detail)
            continue
        if isinstance(reading, SpeedReading):
            continue  # a bump test is taken at standstill; speed is not needed
        assert isinstance(reading, Waveform)
        last_ts[(reading.machine, reading.point)] = reading.ts
        outcome.accepted += 1
        if reading.point == force_point:
            forces[reading.machine].append((reading, force_unit or _FORCE_PLACEHOLDER))
        else:
            hits[(reading.machine, reading.point)].append(reading)
    return hits, forces, reg


@dataclasses.dataclass(frozen=True)
class PointResult:
    machine: str
    point: str
    test: BumpTest
    comparison: tuple[ModeShift, ...]
    hits_used: int
    hits_skipped: int
    ts: float = math.nan  # time of the latest hit used, epoch s
    hit_ts: tuple[float, ...] = ()  # time of each hit paired with a force block, epoch s
    force_channel: str | None = None  # machine/point of the force channel

    def refused_hits(self) -> list[str]:
        """One sentence per hit the force check refused."""
        return [f"force channel {self.force_channel}, hit at {iso_utc(ts)}: {c.message()}."
                for ts, c in zip(self.hit_ts, self.test.hits, strict=True) if not c.accepted]


def _refusal(machine: str, point: str, force_channel: str, hit_ts: list[float],
             exc: ImpactRefused) -> str:
    """The sentence naming a point whose every hit was refused, and why."""
    if len(hit_ts) == 1:
        return (f"force channel {force_channel}, hit at {iso_utc(hit_ts[0])} for "
                f"{machine}/{point}: {exc.checks[0].message()}.")
    return (f"force channel {force_channel} for {machine}/{point}: all {len(hit_ts)} hits "
            "were refused: " + "; ".join(f"{iso_utc(ts)}: {c.message()}"
                                         for ts, c in zip(hit_ts, exc.checks, strict=True)) + ".")


def analyse_point(
    machine: str,
    point: str,
    waves: list[Waveform],
    forces: list[tuple[Waveform, str]],
    *,
    band_hz: tuple[float, float] | None,
    stored: Machine | None,
    tolerance_pct: float,
    force_range: float | None = None,
) -> PointResult:
    """Average the hits of one point (paired with force blocks when there are any);
    ValueError with one sentence when the point's record is refused."""
    first = waves[0]
    fs, unit = first.fs_hz, first.unit
    pairs: list[tuple[Waveform, Waveform | None]] = []
    force_unit = None
    for w in waves:
        if w.fs_hz != fs or units.quantity_of(w.unit) != units.quantity_of(unit):
            continue
        partner = None
        if forces:
            near = [(abs(fw.ts - w.ts), fw, fu) for fw, fu in forces if fw.fs_hz == fs]
            near = [x for x in near if x[0] <= PAIR_TOLERANCE_S]
            if not near:
                continue
            _, partner, fu = min(near, key=lambda x: x[0])
            if force_unit is None:
                force_unit = fu
            elif fu != force_unit:
                continue
        pairs.append((w, partner))
    if not pairs:
        raise ValueError(
            f"{machine}/{point}: no hit has a force block with the same timestamp "
            f"(within {PAIR_TOLERANCE_S * 1e3:g} ms) and sample rate."
        )
    n = min(min(w.samples.size for w, _ in pairs),
            min((f.samples.size for _, f in pairs if f is not None), default=10**12))
    resp = np.stack([units.convert(w.samples[:n], w.unit, unit) for w, _ in pairs])
    partners = [f for _, f in pairs if f is not None]
    force = np.stack([f.samples[:n] for f in partners]) if partners else None
    channel = f"{partners[0].machine}/{partners[0].point}" if partners else None
    hit_ts = [w.ts for w, _ in pairs] if partners else []
    try:
        test = bump_test(
            resp, fs, force=force, quantity=units.quantity_of(unit), unit=unit,
            force_unit=force_unit or "N", force_range=force_range, band_hz=band_hz,
        )
    except ImpactRefused as exc:
        raise ValueError(_refusal(machine, point, channel or "?", hit_ts, exc)) from None
    comparison: tuple[ModeShift, ...] = ()
    if stored is not None and stored.modes:
        comparison = compare_modes(
            stored.modes, [m.frequency_hz for m in test.modes], tolerance_pct=tolerance_pct
        )
    return PointResult(machine, point, test, comparison, test.frf.hits, len(waves) - len(pairs),
                       max(w.ts for w, _ in pairs), tuple(hit_ts), channel)


def result_json(r: PointResult) -> dict[str, Any]:
    """The ``bumptest --json`` object of one measurement point (docs/modes.md)."""
    t = r.test
    return jsonable({
        "machine": r.machine,
        "point": r.point,
        "hits": r.hits_used,
        "hits_skipped": r.hits_skipped,
        "hit_checks": [{"ts": iso_utc(ts), **c.to_json()}
                       for ts, c in zip(r.hit_ts, t.hits, strict=True)],
        "kind": t.frf.kind,
        "unit": t.frf.unit,
        "resolution_hz": t.frf.resolution_hz,
        "band_hz": list(t.band_hz),
        "modes": [m.to_json() for m in t.modes],
        "rejected_peaks": [p.to_json() for p in t.rejected],
        "comparison": [c.to_json() for c in r.comparison],
    })


def print_table(r: PointResult) -> None:
    t = r.test
    click.echo(
        f"{r.machine}/{r.point}: {r.hits_used} hit(s), {t.frf.kind} ({t.frf.unit}), "
        f"resolution {t.frf.resolution_hz:.3g} Hz, band {t.band_hz[0]:.4g}-{t.band_hz[1]:.4g} Hz"
    )
    for text in r.refused_hits():
        click.echo(f"  refused: {text}")
    if not t.modes:
        click.echo("  no mode found in the band.")
    else:
        click.echo(
            f"  {'#':>2} {'f Hz':>9} {'zeta -3dB':>9} {'zeta decr':>9} {'zeta fit':>15} "
            f"{'AF API684':>9} {'1/(2zeta)':>9} {'margin below/above %':>20} {'coh':>5} "
            f"{'S/N dB':>6}"
        )
    for i, m in enumerate(t.modes, 1):
        fit = "-" if m.fit is None else f"{m.fit.damping_ratio:.4f}+-{m.fit.damping_ratio_std:.1g}"
        req = m.required_margin_pct()
        reqs = "-" if req is None else f"{req[0]:.1f} / {req[1]:.1f}"
        click.echo(
            f"  {i:>2} {m.frequency_hz:9.3f} {format_or_dash(m.damping_ratio_half_power, '.4f'):>9} "
            f"{format_or_dash(m.damping_ratio_decrement, '.4f'):>9} {fit:>15} "
            f"{format_or_dash(m.amplification_factor, '.1f'):>9} "
            f"{format_or_dash(m.amplification_factor_from_damping, '.1f'):>9} {reqs:>20} "
            f"{format_or_dash(m.coherence, '.3f'):>5} {format_or_dash(m.noise_margin_db, '.0f'):>6}"
        )
    for p in t.rejected:
        click.echo(f"  not a mode: {p.message}.")
    print_comparison(r.comparison, "not found in this test")


def print_comparison(comparison: tuple[ModeShift, ...], not_found: str) -> None:
    """One line per stored mode: its shift, or ``not_found`` when nothing matched it."""
    for c in comparison:
        if c.status == "not_found":
            click.echo(f"  stored mode {c.mode!r} at {c.stored_hz:.3f} Hz: {not_found}.")
        else:
            click.echo(
                f"  stored mode {c.mode!r} at {c.stored_hz:.3f} Hz -> {c.identified_hz:.3f} Hz: "
                f"{c.shift_pct:+.1f} % ({c.status}, tolerance {c.tolerance_pct:g} %)"
            )


def check_file(file: Path) -> int:
    if not file.is_file():
        raise click.UsageError(f"stream file {str(file)!r} does not exist or is not a file.")
    try:
        return count_lines(file)
    except OSError as exc:
        raise click.ClickException(
            f"cannot read stream file {str(file)!r}: {exc.strerror}."
        ) from exc


def _results(
    hits: dict[tuple[str, str], list[Waveform]],
    forces: dict[str, list[tuple[Waveform, str]]],
    registry: Registry | None,
    band: tuple[float, float] | None,
    tolerance: float,
    force_range: float | None,
    refused: list[str],
) -> Iterator[PointResult]:
    """Each point's result; the sentence of each refused point is appended to ``refused``."""
    known = registry.by_id() if registry is not None else {}
    for (m_id, p_id), waves in sorted(hits.items()):
        try:
            yield analyse_point(
                m_id, p_id, waves, forces.get(m_id, []), band_hz=band,
                stored=known.get(m_id), tolerance_pct=tolerance, force_range=force_range,
            )
        except ValueError as exc:
            refused.append(str(exc))


@click.command("bumptest")
@click.argument("file", type=click.Path(dir_okay=False, path_type=Path))
@click.option("--machines", "machines_file", default=None,
              type=click.Path(dir_okay=False, path_type=Path),
              help="Machine registry (TOML): validates the file and gives the stored modes "
                   "to compare with.")
@click.option("--machine", "machine_id", default=None,
              help="Only this machine of the file.")
@click.option("--band", nargs=2, type=float, default=None, metavar="LO HI",
              help="Search band for modes, Hz.")
@click.option("--force-point", default=None, metavar="POINT",
              help="Point id whose waveforms are the hammer force (unit N, kN or lbf).")
@click.option("--force-range", type=float, default=None, metavar="F",
              help="Stated range (full scale) of the force channel, in its unit: a hit "
                   "reaching it is refused as an overload.")
@click.option("--tolerance", "tolerance_pct", type=float, default=DEFAULT_SHIFT_TOLERANCE_PCT,
              show_default=True, help="Mode shift tolerance, percent of the stored frequency.")
@click.option("--json", "as_json", is_flag=True, help="One JSON object per measurement point.")
@click.option("--prefix", default=DEFAULT_PREFIX, show_default=True, help="MQTT topic prefix.")
@click.option("--record", is_flag=True,
              help="Compare with the modes stored in the database and record mode-shift alarms there.")
@database_options
@recording_options
def bumptest(file: Path, machines_file: Path | None, machine_id: str | None,
             band: tuple[float, float] | None, force_point: str | None,
             force_range: float | None, tolerance_pct: float, as_json: bool, prefix: str,
             record: bool, database_url: str | None, config_file: str | None,
             **recording: Any) -> None:
    """Identify natural frequencies, damping (half-power and logarithmic decrement) and
    amplification factors from the impact-test hits in FILE: a stream file (.jsonl), or a
    recording (.csv, .wav, .uff/.unv) whose channels --point names (--machine required),
    each block of --block-samples one hit."""
    messages = None
    if file.suffix.lower() in RECORDING_FORMATS:
        if machine_id is None:
            raise click.UsageError("a recording needs --machine: the machine its channels belong to.")
        messages = messages_of(recording_waveforms(file, machine_id, **recording), prefix)
        total = len(messages)
    else:
        if recording["points"]:
            raise click.UsageError("--point maps the channels of a recording (.csv, .wav, .uff); "
                                   f"{file.name} is a stream file.")
        total = check_file(file)
    with usage_errors():
        if band is not None:
            validate.ordered_pair(band, "--band")
        check_tolerance_pct(tolerance_pct, "--tolerance")
        if force_range is not None:
            validate.positive(force_range, "--force-range")
    registry, store = comparison_registry(record, machines_file, database_url, config_file)
    try:
        _bumptest(file, total, registry, store, machine_id, band, force_point, force_range,
                  tolerance_pct, as_json, prefix, machines_file, messages)
    finally:
        if store is not None:
            store.close()


def _bumptest(file: Path, total: int, registry: Registry | None, store: Any, machine_id: str | None,
              band: tuple[float, float] | None, force_point: str | None,
              force_range: float | None, tolerance_pct: float, as_json: bool, prefix: str,
              machines_file: Path | None, messages: list[tuple[str, bytes]] | None = None) -> None:
    if registry is not None and machine_id is not None:
        try:
            registry.machine(machine_id)
        except KeyError:
            where = "the database's registry" if store is not None else f"the registry {str(machines_file)!r}"
            raise click.UsageError(f"machine {machine_id!r} is not in {where}.") from None
    outcome = Outcome()
    with click.progressbar(length=total, label="reading hits", file=sys.stderr) as bar:
        hits, forces, _ = read_hits(
            file, registry, prefix=prefix, force_point=force_point, machine_id=machine_id,
            outcome=outcome, on_line=lambda: bar.update(1), messages=messages,
        )
    if not hits:
        outcome.report("waveforms accepted")
        who = f" of machine {machine_id!r}" if machine_id else ""
        raise click.ClickException(f"stream file {str(file)!r} holds no response waveform{who}.")
    refused: list[str] = []
    for r in _results(hits, forces, registry, band, tolerance_pct, force_range, refused):
        for text in r.refused_hits():
            click.echo(f"warning: {file.name}: {text}", err=True)
        transitions: list[dict[str, Any]] = []
        if store is not None and registry is not None:
            transitions = record_comparison(
                store, registry.machine(r.machine), r.comparison, r.ts, r.point,
                {"source": "impact test", "file": file.name, "hits": r.hits_used})
        emit_point(result_json(r) if as_json else None, functools.partial(print_table, r), transitions,
                   recording=store is not None)
    outcome.report("waveforms accepted")
    if refused:
        raise click.ClickException(" ".join(f"{file.name}: {text}" for text in refused))

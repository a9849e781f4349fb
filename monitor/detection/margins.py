"""Separation margins between excitations and natural frequencies.

For every mode of a machine and every excitation (each configured order of running speed,
and 2x line frequency on motors) this module gives the separation margin in percent of the
mode frequency, which side of the excitation the mode lies on, the margin required for the
mode and the single-degree-of-freedom dynamic amplification at the current frequency
ratio. How long a ramping speed takes to bring an excitation into a required band is
:mod:`monitor.detection.approach`.

Conventions
-----------
- Separation margin ``SM = |f_exc - f_mode| / f_mode * 100`` (percent of the mode
  frequency, our convention, docs/alarms.md; API 684 leaves open which speed to divide by).
- ``side`` says where the MODE lies relative to the excitation: ``'below'`` (mode below the
  excitation, the API 684 case of a critical below minimum operating speed) or ``'above'``
  (mode above the excitation, a critical above maximum continuous speed).
- The required band around a mode is therefore asymmetric:
  ``[f_mode * (1 - req_above/100), f_mode * (1 + req_below/100)]``.

References
----------
API Standard 684, "Rotordynamic Tutorial", separation margin rule (as quoted by API 617).
W. T. Thomson, Theory of Vibration with Applications, forced SDOF response and half-power
bandwidth (AF = Q ~= 1 / (2 zeta) for light damping).
"""

from __future__ import annotations

import math
import sys
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any, Literal, NamedTuple

import numpy as np

from monitor.model.registry import Machine, Mode

#: Required margin used when a mode has no amplification factor, no damping ratio and no
#: configured margin, and the machine sets no default: 10 % (common practice, no source).
COMMON_PRACTICE_MARGIN_PCT = 10.0
#: Approach band as a multiple of the required margin (default of the issue).
DEFAULT_APPROACH_FACTOR = 1.5
#: API 684: below this amplification factor a mode is critically damped, no margin needed.
API684_AF_THRESHOLD = 2.5

Side = Literal["below", "above"]
Status = Literal["clear", "approach", "inside"]


def amplification_factor_from_damping(damping_ratio: float) -> float:
    """Amplification factor (dimensionless) from the damping ratio, ``AF = 1 / (2 zeta)``.

    The half-power bandwidth relation for a lightly damped single-degree-of-freedom mode
    (Q = f_n / (f_2 - f_1) ~= 1 / (2 zeta)).

    References
    ----------
    Thomson, Theory of Vibration with Applications, section on the quality factor and
    bandwidth; API 684 defines AF by the half-power points.
    """
    z = float(damping_ratio)
    if not (math.isfinite(z) and 0.0 < z < 1.0):
        raise ValueError(f"damping_ratio must lie in (0, 1), got {damping_ratio!r}.")
    # A damping ratio below about 1e-308 would give an infinite factor: the largest float
    # says the same to every rule (API 684's margins are capped from AF 18.5) and stays JSON.
    return min(1.0 / (2.0 * z), sys.float_info.max)


def api684_required_margin(amplification_factor: float, side: Side) -> float:
    """Separation margin required by API 684, percent of the mode frequency.

    ``AF < 2.5``: 0 (critically damped). Mode below the excitation:
    ``min(16, 17 * (1 - 1/(AF - 1.5)))``. Mode above the excitation:
    ``min(26, 10 + 17 * (1 - 1/(AF - 1.5)))``.

    References
    ----------
    API Standard 684 (rotordynamic tutorial), separation margin clause, as used by API 617.
    """
    af = float(amplification_factor)
    if not (math.isfinite(af) and af >= 1.0):
        raise ValueError(f"amplification_factor must be a finite number >= 1, got {amplification_factor!r}.")
    if side not in ("below", "above"):
        raise ValueError(f"side must be 'below' or 'above', got {side!r}.")
    if af < API684_AF_THRESHOLD:
        return 0.0
    core = 17.0 * (1.0 - 1.0 / (af - 1.5))
    return min(16.0, core) if side == "below" else min(26.0, 10.0 + core)


def sdof_amplification(frequency_ratio: float | np.ndarray, damping_ratio: float) -> float | np.ndarray:
    """Dynamic amplification ``H(r) = 1 / sqrt((1 - r^2)^2 + (2 zeta r)^2)`` (dimensionless).

    ``r`` = excitation frequency / natural frequency. The steady-state response of a
    single-degree-of-freedom mode over its static response.

    References
    ----------
    Thomson, Theory of Vibration with Applications, harmonically excited vibration.
    """
    z = float(damping_ratio)
    if not (math.isfinite(z) and 0.0 < z < 1.0):
        raise ValueError(f"damping_ratio must lie in (0, 1), got {damping_ratio!r}.")
    r = np.asarray(frequency_ratio, dtype=float)
    if np.any(~np.isfinite(r)) or np.any(r < 0):
        raise ValueError(f"frequency_ratio must be finite and >= 0, got {frequency_ratio!r}.")
    h = _amplification(r, z)
    return float(h) if h.ndim == 0 else h


def _amplification(r: Any, z: float, sqrt: Callable[[Any], Any] = np.sqrt) -> Any:
    """:func:`sdof_amplification` without its checks: of an array ``r`` with numpy's
    square root, of a float with ``sqrt=math.sqrt`` (cheaper per row, the same value)."""
    return 1.0 / sqrt((1.0 - r * r) ** 2 + (2.0 * z * r) ** 2)


@dataclass(frozen=True)
class Excitation:
    """One excitation: ``label`` ('1x', '9x', '2xLF'), ``order`` of running speed (None
    for a fixed-frequency excitation) and ``frequency_hz`` at the current speed (Hz)."""

    label: str
    order: float | None
    frequency_hz: float


def order_label(order: float) -> str:
    """'1x', '2x', '9x', '0.5x' ..."""
    return f"{order:g}x"


def excitations(machine: Machine, speed_hz: float) -> tuple[Excitation, ...]:
    """Excitations of ``machine`` at running speed ``speed_hz`` (Hz).

    Each of ``machine.excitation_orders`` times running speed, plus twice the line
    frequency (fixed, not speed dependent) when ``machine.line_frequency_hz`` is set.
    """
    s = float(speed_hz)
    if not (math.isfinite(s) and s >= 0):
        raise ValueError(f"speed_hz must be finite and >= 0, got {speed_hz!r}.")
    out = [Excitation(order_label(o), float(o), float(o) * s) for o in sorted(set(machine.excitation_orders))]
    if machine.line_frequency_hz:
        out.append(Excitation("2xLF", None, 2.0 * float(machine.line_frequency_hz)))
    return tuple(out)


@dataclass(frozen=True)
class RequiredMargin:
    """Required separation margins of one mode, percent of the mode frequency, on each
    side, and where they come from (``basis``: 'configured', 'API 684 (AF)',
    'API 684 (AF from damping)', 'machine default', 'common practice')."""

    below_pct: float
    above_pct: float
    basis: str
    amplification_factor: float | None

    def for_side(self, side: Side) -> float:
        return self.below_pct if side == "below" else self.above_pct

    def band(self, mode_hz: float) -> tuple[float, float]:
        """The required band of a mode at ``mode_hz`` (Hz): excitation frequencies (Hz)
        from ``mode_hz * (1 - above_pct / 100)`` to ``mode_hz * (1 + below_pct / 100)``
        (an excitation above the mode needs the ``below`` margin)."""
        return mode_hz * (1.0 - self.above_pct / 100.0), mode_hz * (1.0 + self.below_pct / 100.0)


def required_margin(mode: Mode, machine_default_pct: float | None = None) -> RequiredMargin:
    """Required margin for ``mode``, in this order of preference.

    1. ``mode.required_margin_pct`` (configured, both sides);
    2. API 684 from ``mode.amplification_factor``;
    3. API 684 from ``mode.damping_ratio`` via ``AF = 1 / (2 zeta)``;
    4. ``machine_default_pct`` (per-machine setting ``required_margin_pct``);
    5. :data:`COMMON_PRACTICE_MARGIN_PCT` (10 %, common practice).
    """
    if mode.required_margin_pct is not None:
        m = float(mode.required_margin_pct)
        return RequiredMargin(m, m, "configured", _af_of(mode))
    af = _af_of(mode)
    if af is not None:
        basis = "API 684 (AF)" if mode.amplification_factor is not None else "API 684 (AF from damping)"
        # 1 / (2 zeta) is below 1 for a damping ratio above 0.5: no peak, and API 684 asks
        # no margin below AF 2.5, as for AF 1.
        rule_af = max(af, 1.0)
        return RequiredMargin(
            api684_required_margin(rule_af, "below"), api684_required_margin(rule_af, "above"), basis, af
        )
    if machine_default_pct is not None:
        return RequiredMargin(float(machine_default_pct), float(machine_default_pct), "machine default", None)
    return RequiredMargin(COMMON_PRACTICE_MARGIN_PCT, COMMON_PRACTICE_MARGIN_PCT, "common practice", None)


def _af_of(mode: Mode) -> float | None:
    if mode.amplification_factor is not None:
        return float(mode.amplification_factor)
    if mode.damping_ratio is not None:
        return amplification_factor_from_damping(mode.damping_ratio)
    return None


def _zeta_of(mode: Mode) -> float | None:
    if mode.damping_ratio is not None:
        return float(mode.damping_ratio)
    if mode.amplification_factor is not None and mode.amplification_factor > 0.5:
        # Inverse of the half-power relation; only meaningful for AF > 0.5 (zeta < 1).
        return 1.0 / (2.0 * float(mode.amplification_factor))
    return None


@dataclass(frozen=True)
class MarginRow:
    """Separation of one excitation from one mode at the current speed.

    Attributes
    ----------
    mode, excitation : str
        Mode name and excitation label ('1x', '9x', '2xLF').
    order : float or None
        Order of running speed, None for a fixed-frequency excitation.
    mode_hz, excitation_hz : float
        Frequencies, Hz.
    margin_pct : float
        Separation margin, percent of the mode frequency.
    side : {'below', 'above'}
        Where the mode lies relative to the excitation.
    required_pct : float
        Required margin on this side, percent; 0 means none required.
    approach_pct : float
        Edge of the approach band, percent (``approach_factor * required_pct``).
    basis : str
        Source of the required margin (see :class:`RequiredMargin`).
    amplification_factor : float or None
    frequency_ratio : float
        Excitation over mode frequency.
    amplification : float or None
        SDOF dynamic amplification at ``frequency_ratio`` (None without damping data).
    in_half_power_band : bool
        Excitation inside the mode's half-power band (``|r - 1| <= zeta``), the resonance
        peak itself.
    status : {'clear', 'approach', 'inside'}
    """

    mode: str
    excitation: str
    order: float | None
    mode_hz: float
    excitation_hz: float
    margin_pct: float
    side: Side
    required_pct: float
    approach_pct: float
    basis: str
    amplification_factor: float | None
    frequency_ratio: float
    amplification: float | None
    in_half_power_band: bool
    status: Status

    @property
    def subject(self) -> str:
        """Alarm subject: ``'<mode>@<excitation>'``."""
        return f"{self.mode}@{self.excitation}"

    def to_json(self) -> dict:
        return {
            "mode": self.mode,
            "excitation": self.excitation,
            "order": self.order,
            "mode_hz": self.mode_hz,
            "excitation_hz": self.excitation_hz,
            "margin_pct": self.margin_pct,
            "side": self.side,
            "required_pct": self.required_pct,
            "approach_pct": self.approach_pct,
            "basis": self.basis,
            "amplification_factor": self.amplification_factor,
            "frequency_ratio": self.frequency_ratio,
            "amplification": self.amplification,
            "in_half_power_band": self.in_half_power_band,
            "status": self.status,
        }


def separation_margin(excitation_hz: float, mode_hz: float) -> tuple[float, Side]:
    """Separation margin (percent of ``mode_hz``) and the side the mode lies on."""
    if not (math.isfinite(mode_hz) and mode_hz > 0):
        raise ValueError(f"mode_hz must be a positive finite frequency, got {mode_hz!r}.")
    if not (math.isfinite(excitation_hz) and excitation_hz >= 0):
        raise ValueError(f"excitation_hz must be finite and >= 0, got {excitation_hz!r}.")
    side: Side = "below" if mode_below(excitation_hz, mode_hz) else "above"
    return margin_pct(excitation_hz, mode_hz), side


def margin_pct(excitation_hz: Any, mode_hz: Any) -> Any:
    """Separation margin ``|f_exc - f_mode| / f_mode * 100``, percent of the mode frequency
    (Hz in; floats or numpy arrays alike, unchecked: :func:`separation_margin` checks)."""
    return abs(excitation_hz - mode_hz) / mode_hz * 100.0


def mode_below(excitation_hz: Any, mode_hz: Any) -> Any:
    """Whether the mode lies below the excitation (a mode at the excitation counts as
    below), so that the mode's ``below`` required margin applies (floats or arrays)."""
    return mode_hz <= excitation_hz


def margin_table(
    machine: Machine,
    speed_hz: float,
    *,
    approach_factor: float = DEFAULT_APPROACH_FACTOR,
    machine_default_pct: float | None = None,
) -> tuple[MarginRow, ...]:
    """Margins of every excitation of ``machine`` from every mode at ``speed_hz`` (Hz).

    Rows are ordered by mode, then excitation. See :class:`MarginRow`.
    """
    grid = MarginGrid(machine, approach_factor=approach_factor, machine_default_pct=machine_default_pct)
    return grid.rows(grid.compute(speed_hz))


@dataclass(frozen=True, eq=False)
class MarginState:
    """All (mode, excitation) margins at one speed as (modes x excitations) arrays.

    ``exc_hz`` (E,) Hz; ``margin_pct``, ``required_pct``, ``approach_pct`` in percent;
    ``ratio`` excitation over mode frequency; ``mode_below`` the mode lies below the
    excitation; ``half_power`` inside the half-power band; ``status`` 0 clear, 1 approach,
    2 inside.
    """

    speed_hz: float
    exc_hz: np.ndarray
    margin_pct: np.ndarray
    required_pct: np.ndarray
    approach_pct: np.ndarray
    ratio: np.ndarray
    mode_below: np.ndarray
    half_power: np.ndarray
    status: np.ndarray


_STATUS: tuple[Status, ...] = ("clear", "approach", "inside")


class _Pair(NamedTuple):
    """One (mode, excitation) pair of a :class:`MarginGrid`: mode frequency (Hz), order
    of running speed (0 for a fixed excitation), fixed frequency (Hz), required margins
    (percent) with the mode below and above the excitation."""

    mode_hz: float
    order: float
    fixed_hz: float
    required_below_pct: float
    required_above_pct: float


class PairMargin(NamedTuple):
    """The margin of one pair at one speed (:meth:`MarginGrid.pair`): percent of the mode
    frequency, the required and approach margins on its side (percent), and the
    excitation over the mode frequency."""

    margin_pct: float
    required_pct: float
    approach_pct: float
    frequency_ratio: float


class MarginGrid:
    """The margins of one machine, set up once and evaluated per speed with numpy.

    The per-reading path of detection: :meth:`compute` gives arrays, :meth:`row` or
    :meth:`rows` the :class:`MarginRow` objects on demand. :func:`margin_table` is this.
    """

    def __init__(self, machine: Machine, *, approach_factor: float = DEFAULT_APPROACH_FACTOR,
                 machine_default_pct: float | None = None) -> None:
        if not (math.isfinite(approach_factor) and approach_factor >= 1.0):
            raise ValueError(f"approach_factor must be a finite number >= 1, got {approach_factor!r}.")
        self.approach_factor = float(approach_factor)
        self.modes = machine.modes
        self.required = tuple(required_margin(m, machine_default_pct) for m in machine.modes)
        zetas = [_zeta_of(m) for m in machine.modes]
        self.mode_hz = np.array([float(m.frequency_hz) for m in machine.modes]).reshape(-1, 1)
        self.req_below = np.array([r.below_pct for r in self.required]).reshape(-1, 1)
        self.req_above = np.array([r.above_pct for r in self.required]).reshape(-1, 1)
        self.zeta = np.array([np.nan if z is None else z for z in zetas]).reshape(-1, 1)
        self.zetas = zetas
        orders = sorted(set(float(o) for o in machine.excitation_orders))
        self.labels = [order_label(o) for o in orders]
        self.orders: list[float | None] = list(orders)
        fixed = [0.0] * len(orders)
        if machine.line_frequency_hz:
            self.labels.append("2xLF")
            self.orders.append(None)
            fixed.append(2.0 * float(machine.line_frequency_hz))
        self.order_arr = np.array([0.0 if o is None else o for o in self.orders])
        self.fixed_arr = np.array(fixed)
        self.n_exc = len(self.labels)
        self.subjects = [f"{m.name}@{lab}" for m in machine.modes for lab in self.labels]
        # Per flat pair (mode-major, as subjects), as floats for :meth:`pair`.
        self.pairs = [_Pair(float(self.mode_hz[i, 0]), float(self.order_arr[j]), float(self.fixed_arr[j]),
                            float(self.req_below[i, 0]), float(self.req_above[i, 0]))
                      for i in range(len(self.modes)) for j in range(self.n_exc)]

    def compute(self, speed_hz: float) -> MarginState:
        s = float(speed_hz)
        if not (math.isfinite(s) and s >= 0):
            raise ValueError(f"speed_hz must be finite and >= 0, got {speed_hz!r}.")
        exc = self.order_arr * s + self.fixed_arr
        fm = self.mode_hz
        sm = margin_pct(exc, fm)
        below = mode_below(exc, fm)
        req = np.where(below, self.req_below, self.req_above)
        appr = req * self.approach_factor
        r = exc / fm
        with np.errstate(invalid="ignore"):
            hp = (np.abs(r - 1.0) <= self.zeta) & (req > 0)
        status = np.where((req > 0) & (sm < req), 2, np.where((req > 0) & (sm < appr), 1, 0))
        return MarginState(s, exc, sm, req, appr, r, below, hp, status)

    def pair(self, index: int, speed_hz: float) -> PairMargin:
        """The margin of flat pair ``index`` (mode-major, as :attr:`subjects`) at running
        speed ``speed_hz`` (Hz, unchecked): :meth:`compute` for one pair, in floats (the
        same operations, so the same numbers), for callers that look at a few pairs."""
        mode_hz, order, fixed_hz, required_below_pct, required_above_pct = self.pairs[index]
        exc = order * speed_hz + fixed_hz
        required = required_below_pct if mode_below(exc, mode_hz) else required_above_pct
        return PairMargin(margin_pct(exc, mode_hz), required, required * self.approach_factor, exc / mode_hz)

    def row(self, st: MarginState, index: int) -> MarginRow:
        """The row of flat ``index`` (mode-major, as :attr:`subjects`)."""
        i, j = divmod(index, self.n_exc)
        z = self.zetas[i]
        r = float(st.ratio[i, j])
        req = self.required[i]
        return MarginRow(
            mode=self.modes[i].name, excitation=self.labels[j], order=self.orders[j],
            mode_hz=float(self.mode_hz[i, 0]), excitation_hz=float(st.exc_hz[j]),
            margin_pct=float(st.margin_pct[i, j]),
            side="below" if st.mode_below[i, j] else "above",
            required_pct=float(st.required_pct[i, j]), approach_pct=float(st.approach_pct[i, j]),
            basis=req.basis, amplification_factor=req.amplification_factor, frequency_ratio=r,
            amplification=_amplification(r, z, math.sqrt) if z is not None and z < 1.0 else None,
            in_half_power_band=bool(st.half_power[i, j]), status=_STATUS[int(st.status[i, j])],
        )

    def rows(self, st: MarginState) -> tuple[MarginRow, ...]:
        return tuple(self.row(st, k) for k in range(len(self.subjects)))


class MarginRows(Sequence[MarginRow]):
    """The rows of a :class:`MarginGrid` at one speed, built on first use.

    Detection decides on the arrays; most readings' tables are never looked at, so
    building 36 row objects per reading would be wasted. Behaves as a read-only sequence
    (``len``, indexing, iteration, equality with a tuple).
    """

    def __init__(self, grid: MarginGrid | None = None, state: MarginState | None = None,
                 speed_hz: float | None = None) -> None:
        # ``speed_hz`` instead of ``state`` defers even the array computation.
        self._grid = grid
        self._state = state
        self._speed = speed_hz
        self._rows: tuple[MarginRow, ...] | None = (
            None if (grid and (state is not None or speed_hz is not None)) else ())

    def _all(self) -> tuple[MarginRow, ...]:
        if self._rows is None:
            assert self._grid is not None
            if self._state is None:
                assert self._speed is not None
                self._state = self._grid.compute(self._speed)
            self._rows = self._grid.rows(self._state)
        return self._rows

    def __len__(self) -> int:
        if self._rows is not None:
            return len(self._rows)
        assert self._grid is not None
        return len(self._grid.subjects)

    def nearest_margin(self) -> MarginRow | None:
        """The tightest pair: the row with the smallest ``margin_pct - required_pct``
        (percent; the first such row on a tie), None for an empty table. Builds that one
        row only."""
        if self._rows is not None:
            return min(self._rows, key=lambda r: r.margin_pct - r.required_pct, default=None)
        assert self._grid is not None
        if self._state is None:
            assert self._speed is not None
            self._state = self._grid.compute(self._speed)
        st = self._state
        if st.margin_pct.size == 0:
            return None
        return self._grid.row(st, int(np.argmin(st.margin_pct - st.required_pct)))

    def __getitem__(self, index):  # type: ignore[override]
        return self._all()[index]

    def __iter__(self):
        return iter(self._all())

    def __eq__(self, other: object) -> bool:
        if isinstance(other, MarginRows | tuple | list):
            return tuple(self) == tuple(other)
        return NotImplemented

    __hash__ = None  # type: ignore[assignment]

    def __repr__(self) -> str:
        return f"MarginRows({len(self)} rows)"

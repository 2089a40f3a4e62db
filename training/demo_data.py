"""Invented demo scenario: the booster pump stations of the (fictional) Quillhaven Terraces
water district, one reading row a minute per pump, with labelled injected faults.

Everything here is made up for the demo and for exercising the pipeline; it is never a
check value for a test of the method.

The physics is deliberately simple but coupled, so a reconstructor has structure to learn:

- demand: a daily cycle with morning and evening peaks (a later, flatter morning at
  weekends), a per-day weather factor shared by the fleet and a per-pump one, and a
  little short-term noise; each pump's flow is its demand share;
- pump curve of a fixed-speed centrifugal pump: head falls with flow squared, and
  discharge pressure = suction pressure + head;
- suction from a slowly varying reservoir level (periodic in absolute time, so any
  stretch of the same fleet joins up) less an inlet loss growing with flow squared;
- motor current from hydraulic power / (pump efficiency x motor efficiency), with the
  motor's magnetising current added in quadrature;
- bearing temperature: a first-order thermal lag of load plus the pump room's daily
  ambient cycle;
- vibration velocity r.m.s. around 1-2.5 mm/s in normal service, rising with the distance
  of the flow from the best-efficiency point.

Per-pump parameters depend only on the seed and the pump's number (never on the length or
start of the stretch), so `generate(start=<later>, days=1, scenario="demo_day")` shows the
same machines a model trained on the default run has learned.

Times are UTC; the invented district keeps UTC, so its daily cycle is in UTC hours.
"""

from __future__ import annotations

import os
import tempfile
import time
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

CHANNELS: tuple[str, ...] = (
    "flow_m3h",
    "suction_kpa",
    "discharge_kpa",
    "current_a",
    "bearing_temp_c",
    "vibration_mm_s",
)
UNITS: dict[str, str] = {
    "flow_m3h": "m3/h",
    "suction_kpa": "kPa",
    "discharge_kpa": "kPa",
    "current_a": "A",
    "bearing_temp_c": "degC",
    "vibration_mm_s": "mm/s",
}
FAULT_KINDS: tuple[str, ...] = (
    "bearing_wear",
    "cavitation",
    "impeller_clog",
    "stuck_sensor",
    "spikes",
    "calibration_drift",
)
EVENT_KINDS: tuple[str, ...] = FAULT_KINDS + ("maintenance",)
SCENARIOS: tuple[str, ...] = ("fleet", "demo_day")

PERIOD_S = 60.0
DEFAULT_START = "2026-09-01T00:00:00Z"
DEFAULT_START_S = 1788220800.0  # 2026-09-01T00:00:00Z
DEFAULT_DAYS = 42
DEFAULT_ASSETS = 6
DEFAULT_SEED = 7
# The default run ends here; a demo replay of the same fleet starts at or after it.
DEMO_DAY_START_S = DEFAULT_START_S + DEFAULT_DAYS * 86400.0

DAY_S = 86400.0
_STEPS_PER_DAY = int(DAY_S / PERIOD_S)
_G = 9.81  # kPa per metre of water column (rho = 1000 kg/m3)
_DECIMALS = {"flow_m3h": 2, "suction_kpa": 1, "discharge_kpa": 1, "current_a": 2, "bearing_temp_c": 2, "vibration_mm_s": 3}
_MISSING_FRACTION = 0.002  # values lost at random (single dropped fields)
_HELD_OUT_DAYS = 8.0  # the default run has every fault kind inside its last 8 days

# Vibration scale: ISO 10816-1 zone boundaries for class II machines (medium machines,
# 15-75 kW, which covers these pumps), velocity r.m.s. 10-1000 Hz, A/B 1.12, B/C 2.8,
# C/D 7.1 mm/s. From secondary tables, not the standard's text. Normal service here sits
# in zones A/B; bearing wear climbs into zone C; nothing reaches D.
ISO10816_CLASS_II_MM_S = {"A/B": 1.12, "B/C": 2.8, "C/D": 7.1}


def asset_id(number: int) -> str:
    """`pump-01`, `pump-02`, ... (1-based, zero-padded to two digits)."""
    return f"pump-{number:02d}"


@dataclass(frozen=True)
class PumpParams:
    """One pump station's fixed physical parameters (from the seed and its number only)."""

    q_bep_m3h: float  # best-efficiency flow
    h_shutoff_m: float  # head at zero flow
    curve_k: float  # head(Q) = h_shutoff * (1 - curve_k * (Q / q_bep)^2)
    eta_bep: float  # pump efficiency at best-efficiency flow
    motor_eta: float
    i_mag_a: float  # magnetising current, added in quadrature to the load current
    demand_share: float  # this pump's demand as a fraction of q_bep at the profile's 1.0
    profile_shift_h: float  # its zone's daily cycle runs slightly early or late
    level_mean_m: float  # reservoir level above the pump inlet
    level_amp_m: float
    level_phase: tuple[float, float]
    inlet_loss_kpa: float  # suction loss at q_bep
    vib_base_mm_s: float  # vibration at best-efficiency flow
    vib_off_bep: float  # relative rise per (Q/q_bep - 1)^2
    ambient_c: float  # pump room's mean temperature
    temp_rise_c: float  # bearing temperature above ambient at rated power
    thermal_tau_min: float  # bearing thermal time constant
    p_rated_kw: float  # shaft power at 1.1 x q_bep


@dataclass(frozen=True)
class PlannedFault:
    """One fault or maintenance period to inject: times are epoch seconds (UTC), end exclusive.

    `channel` names the sensor for stuck_sensor, spikes and calibration_drift (chosen from
    the seed when None); `severity` in 0..1 scales the magnitude within the kind's range
    (drawn from the seed when None).
    """

    asset: str
    kind: str
    start_s: float
    end_s: float
    channel: str | None = None
    severity: float | None = None


@dataclass(frozen=True)
class DemoEvent:
    """A labelled period as written to events.csv (plus the channel for sensor faults)."""

    asset: str
    start_s: float
    end_s: float
    kind: str
    channel: str | None = None


@dataclass
class DemoData:
    """A generated stretch: per asset, reading times (epoch s, UTC) and (N, C) values (NaN = missing)."""

    assets: tuple[str, ...]
    channels: tuple[str, ...]
    units: dict[str, str]
    period_s: float
    start_s: float
    days: float
    seed: int
    scenario: str
    times_s: dict[str, np.ndarray]
    values: dict[str, np.ndarray]
    events: list[DemoEvent] = field(default_factory=list)

    @property
    def n_rows(self) -> int:
        return sum(len(t) for t in self.times_s.values())


def pump_params(seed: int, number: int) -> PumpParams:
    """The fixed parameters of pump `number` (1-based) of the fleet for `seed`."""
    rng = np.random.default_rng([seed, 9173, number])
    q_bep = float(rng.uniform(45.0, 110.0))
    h0 = float(rng.uniform(48.0, 68.0))
    curve_k = float(rng.uniform(0.18, 0.24))
    eta_bep = float(rng.uniform(0.68, 0.78))
    motor_eta = float(rng.uniform(0.90, 0.94))
    q_rated = 1.1 * q_bep
    h_rated = h0 * (1.0 - curve_k * 1.1**2)
    p_rated = _G * q_rated / 3600.0 * h_rated / (eta_bep * (1.0 - 0.55 * 0.1**2))
    i_rated = p_rated / motor_eta * 1000.0 / (np.sqrt(3.0) * 400.0 * 0.86)
    return PumpParams(
        q_bep_m3h=q_bep,
        h_shutoff_m=h0,
        curve_k=curve_k,
        eta_bep=eta_bep,
        motor_eta=motor_eta,
        i_mag_a=float(rng.uniform(0.25, 0.35) * i_rated),
        demand_share=float(rng.uniform(0.85, 0.98)),
        profile_shift_h=float(rng.uniform(-0.6, 0.6)),
        level_mean_m=float(rng.uniform(18.0, 28.0)),
        level_amp_m=float(rng.uniform(1.5, 3.0)),
        level_phase=(float(rng.uniform(0, 2 * np.pi)), float(rng.uniform(0, 2 * np.pi))),
        inlet_loss_kpa=float(rng.uniform(10.0, 20.0)),
        vib_base_mm_s=float(rng.uniform(1.05, 1.4)),
        vib_off_bep=float(rng.uniform(0.7, 1.0)),
        ambient_c=float(rng.uniform(15.0, 20.0)),
        temp_rise_c=float(rng.uniform(16.0, 24.0)),
        thermal_tau_min=float(rng.uniform(35.0, 55.0)),
        p_rated_kw=float(p_rated),
    )


# ---------------------------------------------------------------------------- physics


def _bump(hour: np.ndarray, centre_h: float, width_h: float) -> np.ndarray:
    """A Gaussian bump on the 24 h circle."""
    d = (hour - centre_h + 12.0) % 24.0 - 12.0
    return np.exp(-0.5 * (d / width_h) ** 2)


def _daily_profile(t_s: np.ndarray, shift_h: float) -> np.ndarray:
    """Relative demand: ~0.3 at night, ~1.0 at the weekday morning peak."""
    hour = ((t_s / 3600.0) - shift_h) % 24.0
    weekday = (np.floor(t_s / DAY_S).astype(np.int64) + 3) % 7  # 1970-01-01 was a Thursday; Monday = 0
    weekend = weekday >= 5
    workday = 0.30 + 0.68 * _bump(hour, 7.2, 1.1) + 0.28 * _bump(hour, 12.5, 2.5) + 0.55 * _bump(hour, 19.3, 1.8)
    rest = 0.30 + 0.50 * _bump(hour, 9.4, 1.7) + 0.36 * _bump(hour, 13.5, 3.0) + 0.52 * _bump(hour, 19.6, 2.0)
    return np.where(weekend, rest, workday)


def _day_factors(t_s: np.ndarray, seed: int, number: int) -> np.ndarray:
    """Day-to-day demand factor (fleet weather x this zone), keyed on the absolute day number."""
    day = t_s / DAY_S
    first, last = int(np.floor(day.min())) - 1, int(np.floor(day.max())) + 1
    days = np.arange(first, last + 1)
    fleet = np.array([np.random.default_rng([seed, 77, d]).normal(0.0, 0.05) for d in days])
    own = np.array([np.random.default_rng([seed, 78, number, d]).normal(0.0, 0.03) for d in days])
    # Interpolate between day centres so the factor has no step at midnight.
    return 1.0 + np.interp(day, days + 0.5, fleet + own)


def _smooth_noise(rng: np.random.Generator, n: int, width: int) -> np.ndarray:
    """Unit-variance noise smoothed by a moving average of `width` steps."""
    raw = rng.standard_normal(n + width - 1)
    out = np.convolve(raw, np.full(width, 1.0 / np.sqrt(width)), mode="valid")
    return out


def _first_order_lag(x: np.ndarray, tau_steps: float) -> np.ndarray:
    """y[n] = a*y[n-1] + (1-a)*x[n], started at equilibrium with x[0]; as a truncated convolution."""
    a = np.exp(-1.0 / tau_steps)
    k = int(np.ceil(8.0 * tau_steps))
    kernel = (1.0 - a) * a ** np.arange(k + 1)
    kernel /= kernel.sum()
    padded = np.concatenate([np.full(k, x[0]), x])
    return np.convolve(padded, kernel, mode="full")[k : k + len(x)]


def _head_m(p: PumpParams, q_m3h: np.ndarray) -> np.ndarray:
    return p.h_shutoff_m * (1.0 - p.curve_k * (q_m3h / p.q_bep_m3h) ** 2)


def _pump_eta(p: PumpParams, q_m3h: np.ndarray) -> np.ndarray:
    return np.maximum(p.eta_bep * (1.0 - 0.55 * (q_m3h / p.q_bep_m3h - 1.0) ** 2), 0.15)


def _ramp(t_s: np.ndarray, start_s: float, end_s: float) -> np.ndarray:
    """0 before start, rising linearly to 1 at end, 0 again after end (the fault is over)."""
    r = np.clip((t_s - start_s) / max(end_s - start_s, 1.0), 0.0, 1.0)
    return np.where((t_s >= start_s) & (t_s < end_s), r, 0.0)


def _inside(t_s: np.ndarray, start_s: float, end_s: float) -> np.ndarray:
    return (t_s >= start_s) & (t_s < end_s)


_SENSOR_FAULT_CHANNELS = {
    "stuck_sensor": CHANNELS,
    "spikes": ("flow_m3h", "suction_kpa", "discharge_kpa", "current_a", "vibration_mm_s"),
    "calibration_drift": ("flow_m3h", "suction_kpa", "discharge_kpa", "bearing_temp_c"),
}


def _simulate_asset(
    p: PumpParams,
    t_s: np.ndarray,
    faults: Sequence[PlannedFault],
    seed: int,
    number: int,
    rng: np.random.Generator,
) -> np.ndarray:
    """Readings (T, C) on the grid times `t_s` for one pump, faults applied, rounded like the sensors."""
    n = len(t_s)
    demand = _daily_profile(t_s, p.profile_shift_h) * _day_factors(t_s, seed, number)
    demand = demand * (1.0 + 0.03 * _smooth_noise(rng, n, 15))
    q_demand = np.maximum(p.q_bep_m3h * p.demand_share * demand, 0.12 * p.q_bep_m3h)

    running = np.ones(n)
    flow_factor = np.ones(n)
    head_factor = np.ones(n)
    suction_drop = np.zeros(n)
    vib_mult = np.ones(n)
    vib_add = np.zeros(n)
    temp_add = np.zeros(n)
    for f in faults:
        inside = _inside(t_s, f.start_s, f.end_s)
        r = _ramp(t_s, f.start_s, f.end_s)
        sev = 0.5 if f.severity is None else f.severity
        if f.kind == "maintenance":
            running[inside] = 0.0
        elif f.kind == "bearing_wear":
            vib_mult *= 1.0 + (1.0 + 0.6 * sev) * r**2  # to 2.0-2.6x at the end
            temp_add += (6.0 + 4.0 * sev) * r**1.5
            vib_add += np.where(inside, 0.15 * r * np.abs(rng.standard_normal(n)), 0.0)
        elif f.kind == "cavitation":
            onset = np.clip((t_s - f.start_s) / 600.0, 0.0, 1.0) * inside  # develops over ~10 min
            suction_drop += (40.0 + 30.0 * sev) * onset
            wobble = 0.05 * rng.standard_normal(n) + 0.03 * _smooth_noise(rng, n, 3)
            flow_factor *= 1.0 - onset * (0.05 + 0.03 * sev - wobble)
            head_factor *= 1.0 - onset * (0.03 + 0.04 * rng.standard_normal(n))
            vib_add += onset * (1.2 + 1.0 * sev) * (1.0 + 0.6 * np.abs(rng.standard_normal(n)))
        elif f.kind == "impeller_clog":
            onset = np.clip((t_s - f.start_s) / 1200.0, 0.0, 1.0) * inside  # builds over ~20 min
            flow_factor *= 1.0 - onset * (0.14 + 0.08 * sev)
            head_factor *= 1.0 - onset * (0.07 + 0.05 * sev)

    q = q_demand * flow_factor * running
    head = _head_m(p, q_demand) * head_factor * running
    # Behind a stopped pump the check valve holds part of the network pressure.
    head = np.where(running > 0, head, 0.3 * p.h_shutoff_m)
    level_m = (
        p.level_mean_m
        + p.level_amp_m * np.sin(2 * np.pi * t_s / (3.3 * DAY_S) + p.level_phase[0])
        + 0.5 * p.level_amp_m * np.sin(2 * np.pi * t_s / (9.1 * DAY_S) + p.level_phase[1])
        - 0.6 * np.cos(2 * np.pi * (t_s / 3600.0 - 4.0) / 24.0)  # drawn down by day, refilled at night
    )
    suction = _G * level_m - p.inlet_loss_kpa * (q / p.q_bep_m3h) ** 2 - suction_drop
    discharge = suction + _G * head

    # Current follows the unclogged hydraulics (same current pattern while flow and head drop).
    p_hyd_kw = _G * q_demand / 3600.0 * _head_m(p, q_demand)
    p_shaft_kw = p_hyd_kw / _pump_eta(p, q_demand) * np.where(flow_factor < 1.0, 1.0 + 0.5 * (flow_factor - 1.0) ** 2, 1.0)
    i_load = p_shaft_kw / p.motor_eta * 1000.0 / (np.sqrt(3.0) * 400.0 * 0.86)
    current = np.where(running > 0, np.hypot(i_load, p.i_mag_a), 0.0)

    hour = t_s / 3600.0 % 24.0
    ambient = p.ambient_c + 2.5 * np.sin(2 * np.pi * (hour - 9.0) / 24.0)
    load = running * (0.35 + 0.65 * p_shaft_kw / p.p_rated_kw)
    temp = _first_order_lag(ambient + p.temp_rise_c * load, p.thermal_tau_min * 60.0 / PERIOD_S) + temp_add

    off_bep = (q_demand / p.q_bep_m3h - 1.0) ** 2
    vib = p.vib_base_mm_s * (1.0 + p.vib_off_bep * off_bep) * vib_mult + vib_add
    vib = np.where(running > 0, vib, 0.06)  # background from the neighbouring pump

    # Sensor noise: flow meter ~0.6 % + 0.2 m3/h, pressure transmitters ~1 kPa, current
    # transformer ~0.8 %, RTD ~0.1 degC, vibration transmitter ~5 % (common practice, from memory).
    out = np.empty((n, len(CHANNELS)))
    out[:, 0] = q * (1.0 + 0.006 * rng.standard_normal(n)) + 0.2 * rng.standard_normal(n) * running
    out[:, 1] = suction + 1.0 * rng.standard_normal(n)
    out[:, 2] = discharge + 1.2 * rng.standard_normal(n)
    out[:, 3] = current * (1.0 + 0.008 * rng.standard_normal(n)) + 0.03 * np.abs(rng.standard_normal(n))
    out[:, 4] = temp + 0.1 * rng.standard_normal(n)
    out[:, 5] = vib * (1.0 + 0.05 * rng.standard_normal(n)) + 0.02 * np.abs(rng.standard_normal(n))
    out[:, 0] = np.maximum(out[:, 0], 0.0)

    # Sensor faults act on the measured values.
    for f in faults:
        if f.kind not in _SENSOR_FAULT_CHANNELS:
            continue
        c = CHANNELS.index(f.channel)  # type: ignore[arg-type]
        inside = _inside(t_s, f.start_s, f.end_s)
        sev = 0.5 if f.severity is None else f.severity
        typical = float(np.median(np.abs(out[:, c])))
        if f.kind == "stuck_sensor":
            first = int(np.argmax(inside))
            if inside.any() and first > 0:
                out[inside, c] = out[first - 1, c]
        elif f.kind == "spikes":
            where = np.flatnonzero(inside)
            if len(where):
                k = min(len(where), 6 + int(round(6 * sev)))
                hits = rng.choice(where, size=k, replace=False)
                if CHANNELS[c] == "vibration_mm_s":
                    jump = rng.uniform(2.5, 5.0, size=k)
                else:
                    jump = rng.choice([-1.0, 1.0], size=k) * typical * rng.uniform(0.25, 0.5, size=k)
                out[hits, c] += jump
        elif f.kind == "calibration_drift":
            r = _ramp(t_s, f.start_s, f.end_s)
            if CHANNELS[c] == "bearing_temp_c":
                full = 4.0 + 2.0 * sev
            else:
                full = typical * (0.07 + 0.04 * sev)
            sign = 1.0 if rng.random() < 0.6 else -1.0
            out[:, c] += sign * full * r
    out[:, 0] = np.maximum(out[:, 0], 0.0)
    for j, name in enumerate(CHANNELS):
        out[:, j] = np.round(out[:, j], _DECIMALS[name])
    return out


# ---------------------------------------------------------------------------- fault plan

# Durations in minutes (low, high) and how many of each kind per 14 days.
_DURATION_MIN = {
    "bearing_wear": (1440, 4320),
    "cavitation": (120, 360),
    "impeller_clog": (240, 1200),
    "stuck_sensor": (180, 600),
    "spikes": (25, 35),
    "calibration_drift": (4320, 8640),
    "maintenance": (240, 540),
}
_PLAN_ORDER = ("calibration_drift", "bearing_wear", "impeller_clog", "maintenance", "stuck_sensor", "cavitation", "spikes")
_EVENT_GAP_S = 4 * 3600.0  # two labelled periods on one pump are at least this far apart


def _plan_faults(assets: Sequence[str], start_s: float, days: float, seed: int) -> list[PlannedFault]:
    """Spread every kind over the pumps and the whole period, one of each in the last 8 days."""
    rng = np.random.default_rng([seed, 4242, int(start_s // 60), int(round(days * _STEPS_PER_DAY))])
    end_s = start_s + days * DAY_S
    busy: dict[str, list[tuple[float, float]]] = {a: [] for a in assets}
    plan: list[PlannedFault] = []
    for k_i, kind in enumerate(_PLAN_ORDER):
        if kind == "maintenance":
            n = max(1, int(days // 21))
        else:
            n = max(1, int(round(days / 14.0)))
        lo_min, hi_min = _DURATION_MIN[kind]
        # The last occurrence goes into the held-out tail; the others share the rest evenly.
        tail = min(_HELD_OUT_DAYS, days) * DAY_S
        head_lo, head_hi = start_s + min(0.5 * DAY_S, 0.1 * days * DAY_S), end_s - tail
        if days < _HELD_OUT_DAYS + 2 or n == 1:
            segments = [(start_s + i * (end_s - start_s) / n, start_s + (i + 1) * (end_s - start_s) / n) for i in range(n)]
            if kind != "maintenance" and days >= _HELD_OUT_DAYS + 2:
                segments = [(end_s - tail, end_s)]
        else:
            step = (head_hi - head_lo) / (n - 1)
            segments = [(head_lo + i * step, head_lo + (i + 1) * step) for i in range(n - 1)] + [(end_s - tail, end_s)]
        for j, segment in enumerate(segments):
            # Try the intended stretch first; a short or crowded run falls back to the whole period.
            for attempt in range(400):
                seg_lo, seg_hi = segment if attempt < 200 else (start_s, end_s)
                dur = 60.0 * round(rng.uniform(lo_min, hi_min))
                dur = min(dur, 0.4 * days * DAY_S, max(seg_hi - seg_lo, 3600.0))
                latest = min(seg_hi, end_s) - dur
                if latest <= seg_lo:
                    continue
                t0 = 60.0 * np.floor(rng.uniform(seg_lo, latest) / 60.0)
                asset = assets[(k_i + j + attempt) % len(assets)]
                if any(t0 < b1 + _EVENT_GAP_S and b0 < t0 + dur + _EVENT_GAP_S for b0, b1 in busy[asset]):
                    continue
                channels = _SENSOR_FAULT_CHANNELS.get(kind)
                channel = str(channels[int(rng.integers(len(channels)))]) if channels else None
                busy[asset].append((t0, t0 + dur))
                plan.append(PlannedFault(asset, kind, t0, t0 + dur, channel, float(rng.uniform(0.0, 1.0))))
                break
    plan.sort(key=lambda f: (f.start_s, f.asset))
    return plan


def _demo_day_plan(assets: Sequence[str], start_s: float, days: float) -> list[PlannedFault]:
    """Normal morning, then two clear faults on two pumps: cavitation, later an impeller clog."""
    first = assets[min(1, len(assets) - 1)]
    second = assets[min(3, len(assets) - 1)]
    span_s = days * DAY_S
    plan = [PlannedFault(first, "cavitation", start_s + 0.375 * span_s, start_s + 0.5 * span_s, severity=0.7)]
    if second != first:
        plan.append(PlannedFault(second, "impeller_clog", start_s + 0.55 * span_s, start_s + 0.8 * span_s, severity=0.7))
    return plan


def _outages(rng: np.random.Generator, n_steps: int, days: float) -> np.ndarray:
    """Mask of grid steps lost to a few multi-minute logger outages (rows absent entirely)."""
    lost = np.zeros(n_steps, dtype=bool)
    for _ in range(int(rng.poisson(days / 12.0))):
        length = int(rng.integers(3, 41))
        at = int(rng.integers(0, max(n_steps - length, 1)))
        lost[at : at + length] = True
    return lost


# ---------------------------------------------------------------------------- public API


def generate(
    assets: int = DEFAULT_ASSETS,
    days: float = DEFAULT_DAYS,
    seed: int = DEFAULT_SEED,
    start: str | float | None = None,
    *,
    scenario: str = "fleet",
    fault_plan: Sequence[PlannedFault] | None = None,
    outages: bool | None = None,
) -> DemoData:
    """Generate `days` of one-minute readings for `assets` pumps; deterministic for the arguments.

    scenario "fleet" (default): faults of every kind spread over pumps and time, plus a
    couple of maintenance stops and logger outages. scenario "demo_day" (for replay in the
    service demo; start defaults to the day after the default run): normal hours, then a
    cavitation episode on pump-02 and an impeller clog on pump-04, no outages. An explicit
    `fault_plan` replaces the scenario's faults. `start` is ISO-8601 with offset or epoch
    seconds (UTC) and is rounded down to the minute.
    """
    from service.grid import parse_timestamp

    if scenario not in SCENARIOS:
        raise ValueError(f"unknown scenario {scenario!r}: choose one of {', '.join(SCENARIOS)}")
    if not 1 <= int(assets) <= 99:
        raise ValueError(f"assets must be 1..99, got {assets}")
    if not days > 0:
        raise ValueError(f"days must be positive, got {days}")
    if start is None:
        start_s = DEMO_DAY_START_S if scenario == "demo_day" else DEFAULT_START_S
    else:
        start_s = parse_timestamp(start)
    start_s = float(np.floor(start_s / PERIOD_S) * PERIOD_S)
    ids = tuple(asset_id(i + 1) for i in range(int(assets)))
    n_steps = int(round(days * DAY_S / PERIOD_S))
    if n_steps < 1:
        raise ValueError(f"days={days} is shorter than one {PERIOD_S:g} s sample")
    grid_t = start_s + PERIOD_S * np.arange(n_steps, dtype=np.float64)

    if fault_plan is not None:
        plan = list(fault_plan)
    elif scenario == "demo_day":
        plan = _demo_day_plan(ids, start_s, days)
    else:
        plan = _plan_faults(ids, start_s, days, seed)
    plan_rng = np.random.default_rng([seed, 5151, int(start_s // 60), n_steps])
    checked: list[PlannedFault] = []
    for f in plan:
        if f.asset not in ids:
            raise ValueError(f"fault plan names asset {f.asset!r}; this fleet has {ids[0]} .. {ids[-1]}")
        if f.kind not in EVENT_KINDS:
            raise ValueError(f"fault plan kind {f.kind!r} is not one of {', '.join(EVENT_KINDS)}")
        if not f.end_s > f.start_s:
            raise ValueError(f"fault plan {f.kind} on {f.asset}: end must be after start")
        channel = f.channel
        if f.kind in _SENSOR_FAULT_CHANNELS:
            allowed = _SENSOR_FAULT_CHANNELS[f.kind]
            if channel is None:
                channel = str(allowed[int(plan_rng.integers(len(allowed)))])
            elif channel not in allowed:
                raise ValueError(f"{f.kind} cannot act on {channel!r}: choose one of {', '.join(allowed)}")
        sev = f.severity if f.severity is not None else float(plan_rng.uniform(0.0, 1.0))
        checked.append(PlannedFault(f.asset, f.kind, float(f.start_s), float(f.end_s), channel, sev))
    with_outages = (scenario == "fleet") if outages is None else outages

    times: dict[str, np.ndarray] = {}
    values: dict[str, np.ndarray] = {}
    for number, aid in enumerate(ids, start=1):
        params = pump_params(seed, number)
        rng = np.random.default_rng([seed, number, int(start_s // 60), n_steps])
        faults = [f for f in checked if f.asset == aid]
        vals = _simulate_asset(params, grid_t, faults, seed, number, rng)
        vals[rng.random(vals.shape) < _MISSING_FRACTION] = np.nan
        keep = ~_outages(rng, n_steps, days) if with_outages else np.ones(n_steps, dtype=bool)
        jitter = rng.integers(-4, 5, size=n_steps).astype(np.float64)  # logger clock, whole seconds
        times[aid] = (grid_t + jitter)[keep]
        values[aid] = vals[keep]

    events = [DemoEvent(f.asset, f.start_s, f.end_s, f.kind, f.channel) for f in checked]
    events.sort(key=lambda e: (e.start_s, e.asset, e.kind))
    return DemoData(
        assets=ids,
        channels=CHANNELS,
        units=dict(UNITS),
        period_s=PERIOD_S,
        start_s=start_s,
        days=float(days),
        seed=int(seed),
        scenario=scenario,
        times_s=times,
        values=values,
        events=events,
    )


def iso_utc(ts_s: np.ndarray) -> np.ndarray:
    """ISO-8601 UTC strings with a trailing Z, whole seconds."""
    return np.datetime_as_string(np.round(np.asarray(ts_s)).astype("datetime64[s]"), unit="s", timezone="UTC")


def _format_column(col: np.ndarray, decimals: int) -> list[str]:
    fmt = f"{{:.{decimals}f}}".format
    return ["" if v != v else fmt(v) for v in col.tolist()]


def readings_csv_lines(demo: DemoData) -> list[str]:
    """The wide-layout CSV lines (header first), rows ordered by time then asset."""
    all_t = np.concatenate([demo.times_s[a] for a in demo.assets])
    all_v = np.concatenate([demo.values[a] for a in demo.assets])
    which = np.concatenate([np.full(len(demo.times_s[a]), i) for i, a in enumerate(demo.assets)])
    order = np.lexsort((which, all_t))
    cols = [iso_utc(all_t[order]).tolist(), [demo.assets[i] for i in which[order].tolist()]]
    cols += [_format_column(all_v[order, j], _DECIMALS.get(c, 4)) for j, c in enumerate(demo.channels)]
    lines = [",".join(("timestamp", "asset") + tuple(demo.channels))]
    lines += [",".join(row) for row in zip(*cols)]
    return lines


def events_csv_lines(events: Sequence[DemoEvent]) -> list[str]:
    lines = ["asset,start,end,kind"]
    for e in events:
        start, end = iso_utc(np.array([e.start_s, e.end_s])).tolist()
        lines.append(f"{e.asset},{start},{end},{e.kind}")
    return lines


def _write_atomic(path: Path, lines: list[str]) -> None:
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".tmp")
    try:
        with os.fdopen(fd, "w", encoding="utf-8", newline="\n") as fh:
            fh.write("\n".join(lines))
            fh.write("\n")
        os.chmod(tmp, 0o644)
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise


def write(demo: DemoData, out_dir: str | os.PathLike[str]) -> tuple[Path, Path]:
    """Write DIR/readings.csv (wide layout) and DIR/events.csv; each file appears whole or not at all."""
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    readings, events = out / "readings.csv", out / "events.csv"
    _write_atomic(readings, readings_csv_lines(demo))
    _write_atomic(events, events_csv_lines(demo.events))
    return readings, events


def recent_start(days: float = 1.0, now_s: float | None = None) -> float:
    """Start of a stretch of `days` that ends at the current minute (UTC): a demo replay of it
    leaves the assets reporting, and no reading lies in the future."""
    now = time.time() if now_s is None else float(now_s)
    return float((now // PERIOD_S) * PERIOD_S - days * DAY_S)


def demo_day(seed: int = DEFAULT_SEED, assets: int = DEFAULT_ASSETS, start: str | float | None = None) -> DemoData:
    """One day of the same fleet after the default run with two clear faults (for the service demo)."""
    return generate(assets=assets, days=1, seed=seed, start=start, scenario="demo_day")


def sample_windows(window: int, count: int, *, stride: int, days: float, seed: int, max_fill_steps: int = 5) -> np.ndarray:
    """Up to `count` float32 (B, W, C) windows of one normal demo pump (no outages), cut by
    service/grid.py the way the service cuts them: for benches and reference checks."""
    from service import grid as G

    demo = generate(assets=1, days=days, seed=seed, outages=False)
    a = demo.assets[0]
    g = G.align(demo.times_s[a], demo.values[a], demo.period_s)
    filled = G.Grid(g.start, G.fill_gaps(g.values, max_fill_steps))
    ends = G.window_ends(filled, window, stride)
    return G.cut_windows(filled, ends[:count], window)

"""Physics-based synthetic cranking captures for the capture tests (invented engines only).

Cylinder volume, slider-crank kinematics (Heywood, *Internal Combustion Engine Fundamentals*,
McGraw-Hill 1988, ch. 2, cylinder volume equation; domain.md §3.1; the equation number,
2.4, is from memory, unverified):

    V(θ) = V_c + (π B² / 4) · (l + a − s),   s = a·cos θ + √(l² − a²·sin² θ),
    a = stroke / 2,   V_c = V_d / (r_c − 1),   θ = 0 at top dead centre.

Valves shut (intake closing to exhaust opening), the trapped gas follows the polytropic
relation p·vⁿ = const per unit mass (v = V/m; domain.md §3.1, any thermodynamics text),
so p = p_ivc · μⁿ · (V_ivc / V)ⁿ with μ = m / m_ivc. Leakage past rings and valves removes
mass in proportion to the pressure difference, dμ/dt = −λ·(p − p_amb) (gas flows back in
when the cylinder is below ambient). With λ = 0 and the intake closing at bottom dead
centre the peak is exactly p_ivc·r_cⁿ, domain.md §9 check value 10.

Intake stroke: the cylinder sits at the manifold pressure, p_amb − D_mean − D_pulse·g(θ),
with g ∝ (dV/dθ)² (quasi-steady flow through a restriction: Δp ∝ velocity²), normalised to
a maximum of 1. Exhaust stroke: ambient. Cranking speed: a mean speed with a slow battery
sag, a starter spin-up at the start, and a dip at each compression event. Starter current:
a DC motor's current follows its load torque, here the gas torque −Σ(p − p_amb)·dV/dθ
over the cylinders plus friction, floored at the no-load current when the engine pushes the
starter (overrunning clutch), with an inrush at the start.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

GRID_DEG = 0.25  # crank-angle step of the simulation


@dataclass(frozen=True)
class Geometry:
    """Bore, stroke, rod length (m) and compression ratio of an invented engine."""

    bore_m: float = 0.086
    stroke_m: float = 0.086
    rod_m: float = 0.145
    compression_ratio: float = 9.0

    @property
    def swept_m3(self) -> float:
        return np.pi * self.bore_m**2 / 4 * self.stroke_m

    @property
    def clearance_m3(self) -> float:
        return self.swept_m3 / (self.compression_ratio - 1)

    def volume(self, theta_rad: np.ndarray) -> np.ndarray:
        """Cylinder volume (m³) at crank angle θ from top dead centre (slider-crank)."""
        a, rod = self.stroke_m / 2, self.rod_m
        s = a * np.cos(theta_rad) + np.sqrt(rod**2 - (a * np.sin(theta_rad)) ** 2)
        return self.clearance_m3 + np.pi * self.bore_m**2 / 4 * (rod + a - s)

    def dvolume(self, theta_rad: np.ndarray) -> np.ndarray:
        """dV/dθ (m³ per radian), the derivative of :meth:`volume`."""
        a, rod = self.stroke_m / 2, self.rod_m
        sin, cos = np.sin(theta_rad), np.cos(theta_rad)
        ds = -a * sin - a**2 * sin * cos / np.sqrt(rod**2 - (a * sin) ** 2)
        return -np.pi * self.bore_m**2 / 4 * ds


@dataclass(frozen=True)
class Cranking:
    """One cranking test of a four-stroke engine."""

    cylinders: int = 4
    firing_order: tuple[int, ...] = (1, 3, 4, 2)
    rpm: float = 200.0
    sag: float = 0.08  # fraction of speed lost from start to end (battery sag)
    spin_up_deg: float = 90.0  # starter spin-up, crank degrees (e-folding)
    ripple: float = 0.05  # speed dip at each compression event, fraction
    baro_kpa: float = 101.325
    n: float = 1.3
    ivc_abdc_deg: float = 0.0  # intake closes this far after bottom dead centre
    evo_bbdc_deg: float = 0.0  # exhaust opens this far before bottom dead centre
    leak: tuple[float, ...] = (3e-4, 3e-4, 3e-4, 3e-4)  # λ per cylinder, 1/(kPa·s)
    seal_first: float = 1.0  # leak multiplier on a cylinder's first event (rings not sealed)
    seal_events: float = 1.5  # events for that multiplier to fall by e
    intake_mean_kpa: float = 0.0  # manifold depression held through the intake stroke
    intake_pulse_kpa: float = 0.0  # extra depression at the fastest piston speed
    duration_s: float = 3.0
    first_tdc_deg: float = 200.0  # crank angle of the first compression TDC (firing position 0)


@dataclass
class Simulation:
    """A simulated cranking test on the crank-angle grid, with its ground truth."""

    geometry: Geometry
    cranking: Cranking
    theta_deg: np.ndarray  # global crank angle
    time_s: np.ndarray
    pressure_kpa: np.ndarray  # (cylinders, grid) absolute
    peaks: dict[int, np.ndarray] = field(default_factory=dict)  # gauge kPa, per cylinder
    peak_times: dict[int, np.ndarray] = field(default_factory=dict)
    tdc_times: dict[int, np.ndarray] = field(default_factory=dict)

    def rpm_between(self, t0: float, t1: float) -> float:
        """Mean crank speed between two times (rpm), from the simulated crank angle."""
        th = np.interp([t0, t1], self.time_s, self.theta_deg)
        return float((th[1] - th[0]) / 360.0 / (t1 - t0) * 60.0)

    def gas_torque_nm(self) -> np.ndarray:
        """Torque the gas forces oppose the crank with (N·m): −Σ (p − p_amb)·dV/dθ."""
        torque = np.zeros_like(self.theta_deg)
        for c in range(self.cranking.cylinders):
            phi = np.deg2rad(self._cycle_angle(c + 1))
            gauge_pa = (self.pressure_kpa[c] - self.cranking.baro_kpa) * 1000.0
            torque -= gauge_pa * self.geometry.dvolume(phi)
        return torque

    def _cycle_angle(self, cylinder: int) -> np.ndarray:
        k = self.cranking.firing_order.index(cylinder)
        tdc0 = self.cranking.first_tdc_deg + k * 720.0 / self.cranking.cylinders
        return np.mod(self.theta_deg - tdc0, 720.0)


def _omega_deg_s(theta: np.ndarray, crank: Cranking, theta_end: float) -> np.ndarray:
    mean = 6.0 * crank.rpm * (1.0 - crank.sag * theta / theta_end)
    spin = 1.0 - 0.7 * np.exp(-theta / crank.spin_up_deg)
    events = np.cos(np.deg2rad((theta - crank.first_tdc_deg) * crank.cylinders / 2.0))
    return mean * spin * (1.0 - crank.ripple * events)


def simulate(geometry: Geometry, crank: Cranking) -> Simulation:
    """Simulate the in-cylinder pressures of every cylinder over the cranking test."""
    theta_end = 6.0 * crank.rpm * crank.duration_s * 1.6 + 360.0
    theta = np.arange(0.0, theta_end, GRID_DEG)
    omega = _omega_deg_s(theta, crank, theta_end)
    time = np.concatenate([[0.0], np.cumsum(GRID_DEG / (0.5 * (omega[1:] + omega[:-1])))])
    keep = time <= crank.duration_s
    theta, time, omega = theta[keep], time[keep], omega[keep]
    sim = Simulation(geometry, crank, theta, time,
                     np.empty((crank.cylinders, theta.size)))
    pa = crank.baro_kpa
    dv = geometry.dvolume(np.deg2rad(np.arange(0.0, 720.0, GRID_DEG)))
    g_max = np.max(dv[(np.arange(dv.size) * GRID_DEG >= 360) & (np.arange(dv.size) * GRID_DEG
                                                                   < 540)] ** 2)
    ivc = 540.0 + crank.ivc_abdc_deg
    evo = 180.0 - crank.evo_bbdc_deg
    steps = int(round((720.0 - ivc + evo) / GRID_DEG))
    for c in range(1, crank.cylinders + 1):
        phi = sim._cycle_angle(c)
        # Open valves: intake depression (velocity-squared profile), else ambient.
        p = np.full(theta.size, pa)
        intake = (phi >= 360.0) & (phi < ivc)
        g = np.where(phi < 540.0, geometry.dvolume(np.deg2rad(phi)) ** 2 / g_max, 0.0)
        p[intake] = pa - crank.intake_mean_kpa - crank.intake_pulse_kpa * g[intake]
        # Closed phases, every event whose intake closes after the start of the record.
        k = crank.firing_order.index(c)
        tdc = crank.first_tdc_deg + k * 720.0 / crank.cylinders + 720.0 * np.arange(0, 200)
        start = tdc - 720.0 + ivc
        ok = (start >= 0) & (start + steps * GRID_DEG < theta[-1])
        tdc, start = tdc[ok], start[ok]
        first = np.rint(start / GRID_DEG).astype(int)
        events = np.arange(tdc.size)
        lam = crank.leak[c - 1] * (1.0 + (crank.seal_first - 1.0)
                                   * np.exp(-events / crank.seal_events))
        p_ivc = pa - crank.intake_mean_kpa
        v_ivc = geometry.volume(np.deg2rad(np.full(tdc.size, ivc - 720.0)))
        mu = np.ones(tdc.size)
        closed = np.empty((tdc.size, steps + 1))
        for s in range(steps + 1):
            idx = first + s
            ang = np.deg2rad(theta[idx] - tdc)
            dt = GRID_DEG / omega[idx]
            p_s = p_ivc * mu**crank.n * (v_ivc / geometry.volume(ang)) ** crank.n
            closed[:, s] = p_s
            # Midpoint step of dμ/dt = −λ (p − p_amb).
            mu_mid = mu - 0.5 * dt * lam * (p_s - pa)
            ang_mid = np.deg2rad(theta[idx] + GRID_DEG / 2 - tdc)
            p_mid = p_ivc * mu_mid**crank.n * (v_ivc / geometry.volume(ang_mid)) ** crank.n
            mu = mu - dt * lam * (p_mid - pa)
        rows = first[:, None] + np.arange(steps + 1)[None, :]
        p[rows.ravel()] = closed.ravel()
        sim.pressure_kpa[c - 1] = p
        # Ground truth: each event's peak (3-point parabola on the fine grid) and its time.
        j = np.argmax(closed, axis=1)
        y0, y1, y2 = (closed[events, j - 1], closed[events, j], closed[events, j + 1])
        denom = y0 - 2 * y1 + y2
        shift = 0.5 * (y0 - y2) / denom
        sim.peaks[c] = y1 - 0.25 * (y0 - y2) * shift - pa
        sim.peak_times[c] = np.interp(first + j + shift, np.arange(time.size), time)
        sim.tdc_times[c] = np.interp(tdc, theta, time)
    return sim


def sample(sim: Simulation, rate_hz: float, values: np.ndarray, noise: float,
           rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    """Sample a grid signal at a fixed rate, as a scope would, and add white noise."""
    t = np.arange(0.0, sim.time_s[-1], 1.0 / rate_hz)
    return t, np.interp(t, sim.time_s, values) + rng.normal(0.0, noise, t.size)


def pressure_gauge(sim: Simulation, cylinder: int) -> np.ndarray:
    """A cylinder's gauge pressure (kPa) on the grid."""
    return sim.pressure_kpa[cylinder - 1] - sim.cranking.baro_kpa


def starter_current(sim: Simulation, *, amps_per_nm: float = 1.2, friction_a: float = 90.0,
                    no_load_a: float = 40.0, inrush_a: float = 350.0,
                    inrush_s: float = 0.05) -> np.ndarray:
    """Starter current (A) on the grid: load torque over the motor's torque constant."""
    amps = friction_a + amps_per_nm * sim.gas_torque_nm()
    amps = np.maximum(amps, no_load_a)
    return amps + inrush_a * np.exp(-sim.time_s / inrush_s)


def manifold_vacuum(sim: Simulation) -> np.ndarray:
    """Manifold vacuum (kPa below ambient) while cranking: every cylinder's intake draw."""
    crank = sim.cranking
    vac = np.full(sim.theta_deg.size, float(crank.intake_mean_kpa))
    dv = sim.geometry.dvolume(np.deg2rad(np.arange(360.0, 540.0, GRID_DEG)))
    g_max = np.max(dv**2)
    for c in range(1, crank.cylinders + 1):
        phi = sim._cycle_angle(c)
        inside = (phi >= 360.0) & (phi < 540.0)
        vac[inside] += crank.intake_pulse_kpa * (sim.geometry.dvolume(np.deg2rad(phi[inside]))
                                                 ** 2 / g_max)
    return vac


def idle_vacuum(*, rate_hz: float, duration_s: float, rpm: float, cylinders: int,
                mean_kpa: float, pulse_kpa: float, dip_kpa: float, dip_slot: int,
                noise_kpa: float, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    """Idle manifold vacuum: a firing-frequency pulsation, and one slot of each engine cycle
    (one cylinder) dropping ``dip_kpa`` deeper: the regular flick of a leaking cylinder.

    The pulsation (peak to peak ``pulse_kpa``) reaches its lowest vacuum once per firing
    event; the leaking cylinder's dip is centred on its slot's lowest point, so that slot's
    lowest vacuum is exactly ``dip_kpa`` under the others.
    """
    t = np.arange(0.0, duration_s, 1.0 / rate_hz)
    wander = 1.0 + 0.01 * np.sin(2 * np.pi * 0.7 * t)  # a slowly wandering idle speed
    cycles = np.cumsum(wander) / rate_hz * rpm / 120.0  # engine cycles elapsed
    firing = cycles * cylinders
    vac = mean_kpa + 0.5 * pulse_kpa * np.cos(2 * np.pi * firing)
    # Lowest vacuum of each firing slot at firing = k + 0.5; the leaking one every cycle.
    dist = np.mod(firing - (dip_slot + 0.5), cylinders)
    dist = np.minimum(dist, cylinders - dist)
    vac -= dip_kpa * np.exp(-0.5 * (dist / 0.12) ** 2)
    return t, vac + rng.normal(0.0, noise_kpa, t.size)


def hump_torque_nm(sim: Simulation) -> dict[int, float]:
    """Each cylinder's compression load: the highest gas torque in the quarter cycle before
    its top dead centres (median over its events), from the model's pressures and kinematics.
    """
    crank = sim.cranking
    torque = sim.gas_torque_nm()
    spacing = 720.0 / crank.cylinders
    out = {}
    for c in range(1, crank.cylinders + 1):
        tdc = np.interp(sim.tdc_times[c], sim.time_s, sim.theta_deg)
        peaks = [torque[(sim.theta_deg >= a - 0.75 * spacing) & (sim.theta_deg <= a
                                                                  + 0.25 * spacing)].max()
                 for a in tdc]
        out[c] = float(np.median(peaks))
    return out

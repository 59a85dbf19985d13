"""Frequency control of motor-driven alternator sets (bench drives, not grid governors), and load sharing.

Drive model of one set
    Shaft speed ``w`` (rad/s, mechanical), electrical frequency ``f = p * w / (2 pi)`` with ``p`` pole pairs.
    ``J dw/dt = T - P_e / w - B w``: drive torque ``T``, electrical power ``P_e`` the alternator delivers
    (W), viscous loss ``B`` (N m s/rad). The speed loop is a PI on the speed error ``e = w_ref - w``:
    ``u = kp e + ki x`` with ``dx/dt = e``; ``T = clip(u, -T_lim, +T_lim)`` (a four-quadrant bench drive);
    while the torque is saturated a back-calculation term ``(T - u) / (ki T_t)`` pulls the integrator back
    (anti-windup). The reference is lowered by droop,
    ``f_ref = f_set - droop * f_rated * P_e / P_rated`` (``P_rated`` = the set's VA rating, unity power
    factor), or ``f_ref = f_set`` in isochronous mode.
Loads of an island
    The EMF is proportional to speed at a fixed field, so a load's power moves with frequency:
    ``P(f) = P0 * (f / f0)^a`` (:class:`ExponentLoad`; ``a = 2`` for a resistance fed from the EMF,
    ``P = (E f/f_rated)^2 / R``), or any callable ``P(f_hz) -> W``.
Paralleled with the mains reference
    The mains is an infinite bus the set cannot move: ``P_e = P_max sin(delta)``, ``d delta/dt =
    2 pi (f - f_bus)`` (electrical rad), with ``P_max = E V / X`` between the EMF and the bus.
Load sharing (closed form; what a network solver should use for droop sources)
    A droop source ``i`` delivers ``P_i(f) = P_i0 + K_i (f_set_i - f)``-style power with stiffness
    ``K_i = P_rated_i / (droop_i * f_rated_i)`` (W/Hz). A load change ``dP`` on an island moves the common
    frequency by ``df = -dP / (sum_i K_i + D)`` with ``D`` the load damping (W/Hz, ``dP_load/df``), and
    source ``i`` takes ``dP_i = -K_i df``. In per unit on a common base this is ``dw = -dP_L / (D + sum 1/R_i)``.
    An isochronous source (droop 0) has infinite stiffness: it holds ``df = 0`` and takes the whole change;
    an infinite bus does the same.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Literal

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import signal
from scipy.integrate import solve_ivp
from scipy.optimize import brentq

from labkit.core.bench import AlternatorSet
from labkit.core.errors import ModelInputError

LoadModel = Callable[[NDArray[np.float64]], NDArray[np.float64]]
"""Electrical load power (W) as a function of frequency (Hz), vectorized."""

TWO_PI = 2.0 * math.pi


# -- the set -------------------------------------------------------------------------------------
@dataclass(frozen=True)
class DriveSet:
    """Speed-loop parameters of one motor-driven alternator set.

    Attributes
    ----------
    name
        Source id (``G1``).
    inertia_kgm2
        Shaft inertia of motor + alternator, J (kg m^2).
    pole_pairs
        Alternator pole pairs p (electrical f = p x shaft rev/s).
    rated_frequency_hz
        Rated frequency (Hz).
    rating_va
        Rating (VA); the droop's ``P_rated`` (W at unity power factor).
    kp
        Proportional gain (N m s/rad, torque per rad/s of speed error).
    ki
        Integral gain (N m/rad).
    torque_limit_nm
        Drive torque limit, applied symmetrically (N m).
    mode
        ``droop`` or ``isochronous``.
    droop
        Droop as a fraction (0.05 = 5 %: 3 Hz from no load to full load at 60 Hz).
    friction_nms
        Viscous loss coefficient B (N m s/rad).
    antiwindup_tracking_s
        Tracking time constant T_t of the back-calculation anti-windup (s); default a tenth of the integral
        time ``kp / ki`` (common practice: faster than the integral action), 10 ms when ``kp = 0``.
    """

    name: str
    inertia_kgm2: float
    pole_pairs: int
    rated_frequency_hz: float
    rating_va: float
    kp: float
    ki: float
    torque_limit_nm: float
    mode: Literal["droop", "isochronous"] = "droop"
    droop: float = 0.05
    friction_nms: float = 0.0
    antiwindup_tracking_s: float | None = None

    def __post_init__(self) -> None:
        checks = {
            "inertia_kgm2": self.inertia_kgm2 > 0, "pole_pairs": self.pole_pairs >= 1,
            "rated_frequency_hz": self.rated_frequency_hz > 0, "rating_va": self.rating_va > 0,
            "kp": self.kp >= 0, "ki": self.ki >= 0, "torque_limit_nm": self.torque_limit_nm > 0,
            "droop": 0 <= self.droop <= 0.5, "friction_nms": self.friction_nms >= 0,
            "antiwindup_tracking_s": self.antiwindup_tracking_s is None or self.antiwindup_tracking_s > 0,
        }
        for key, ok in checks.items():
            value = getattr(self, key)
            if not ok or (value is not None and not math.isfinite(value)):
                msg = f"DriveSet {self.name}: {key} = {value!r} is outside what the drive model accepts"
                raise ModelInputError(msg)
        if self.mode not in ("droop", "isochronous"):
            msg = f'DriveSet {self.name}: mode expected "droop" or "isochronous", found {self.mode!r}'
            raise ModelInputError(msg)

    @classmethod
    def from_alternator_set(cls, source: AlternatorSet, friction_nms: float = 0.0) -> DriveSet:
        """Take the parameters from a bench's :class:`~labkit.core.bench.AlternatorSet`."""
        sc = source.speed_control
        return cls(name=source.id, inertia_kgm2=float(source.inertia), pole_pairs=int(source.pole_pairs),
                   rated_frequency_hz=float(source.rated_frequency), rating_va=float(source.rating),
                   kp=float(sc.kp), ki=float(sc.ki), torque_limit_nm=float(sc.torque_limit), mode=sc.mode,
                   droop=float(sc.droop), friction_nms=friction_nms)

    @property
    def tracking_time_s(self) -> float:
        """Tracking time constant of the anti-windup (s)."""
        if self.antiwindup_tracking_s is not None:
            return self.antiwindup_tracking_s
        return 0.1 * self.kp / self.ki if (self.kp > 0 and self.ki > 0) else 0.01

    @property
    def effective_droop(self) -> float:
        """The droop in use: 0 in isochronous mode."""
        return self.droop if self.mode == "droop" else 0.0

    def shaft_speed(self, f_hz: ArrayLike) -> NDArray[np.float64]:
        """Mechanical shaft speed (rad/s) at electrical frequency ``f_hz``."""
        return TWO_PI * np.asarray(f_hz, dtype=float) / self.pole_pairs

    def frequency(self, omega: ArrayLike) -> NDArray[np.float64]:
        """Electrical frequency (Hz) at shaft speed ``omega`` (rad/s)."""
        return self.pole_pairs * np.asarray(omega, dtype=float) / TWO_PI

    def reference_frequency(self, f_setpoint_hz: ArrayLike, p_e_w: ArrayLike) -> NDArray[np.float64]:
        """Speed-loop reference: setpoint lowered by ``droop * f_rated * P_e / P_rated`` (Hz)."""
        return (np.asarray(f_setpoint_hz, dtype=float)
                - self.effective_droop * self.rated_frequency_hz * np.asarray(p_e_w, dtype=float) / self.rating_va)


@dataclass(frozen=True)
class ExponentLoad:
    """``P(f) = p0_w * (f / f0_hz)^exponent``: a load fed from an EMF proportional to speed.

    ``exponent`` is the voltage exponent of the load (2 for a resistance, 0 for constant power, 1 for
    constant current), since the voltage follows the frequency at a fixed field.
    """

    p0_w: float
    exponent: float
    f0_hz: float

    def __call__(self, f_hz: ArrayLike) -> NDArray[np.float64]:
        """Power (W) at ``f_hz``."""
        return self.p0_w * (np.asarray(f_hz, dtype=float) / self.f0_hz) ** self.exponent

    def damping_w_per_hz(self) -> float:
        """``dP/df`` at ``f0`` (W/Hz): the load damping D in SI."""
        return self.exponent * self.p0_w / self.f0_hz


def resistive_island_load(emf_rated_v: float, r_ohm: float, rated_frequency_hz: float,
                          field: float = 1.0) -> ExponentLoad:
    """A resistance fed from the set's EMF: ``P = (field * E_rated * f / f_rated)^2 / R`` (W)."""
    if r_ohm <= 0 or emf_rated_v <= 0:
        msg = f"resistive_island_load: expected a positive EMF and resistance, found {emf_rated_v!r} V, {r_ohm!r} ohm"
        raise ModelInputError(msg)
    return ExponentLoad((field * emf_rated_v) ** 2 / r_ohm, 2.0, rated_frequency_hz)


def _as_load(load: LoadModel | Sequence[LoadModel] | None) -> LoadModel:
    if load is None:
        return lambda f: np.zeros_like(np.asarray(f, dtype=float))
    if callable(load):
        return load
    parts = list(load)
    return lambda f: np.sum([np.asarray(p(f), dtype=float) for p in parts], axis=0)


# -- steady state --------------------------------------------------------------------------------
@dataclass(frozen=True)
class SteadyState:
    """Steady operating point of a set."""

    frequency_hz: float
    power_w: float  # electrical power delivered
    torque_nm: float  # drive torque
    torque_limited: bool


def _required_torque(drive: DriveSet, load: LoadModel, f: float) -> float:
    w = float(drive.shaft_speed(f))
    return float(load(np.asarray(f))) / w + drive.friction_nms * w


def _bracket_near(func: Callable[[float], float], f_lo: float, f_hi: float, f_near: float,
                  n_grid: int = 400) -> tuple[float, float] | None:
    """The sign-change interval of ``func`` on a grid over [f_lo, f_hi] closest to ``f_near`` (None if none).

    The operating point nearest the setpoint is the one a set running near its setpoint settles at; a load
    with constant power also balances at a very low speed, which is not where the set goes.
    """
    grid = np.unique(np.concatenate([np.geomspace(f_lo, f_hi, n_grid), [f_near]]))
    grid = grid[(grid >= f_lo) & (grid <= f_hi)]
    values = np.array([func(float(f)) for f in grid])  # a few hundred scalar evaluations, once per solve
    if np.any(values == 0):
        exact = grid[values == 0]
        f0 = float(exact[np.argmin(np.abs(exact - f_near))])
        return f0, f0
    change = np.nonzero(np.sign(values[:-1]) != np.sign(values[1:]))[0]
    if change.size == 0:
        return None
    i = change[np.argmin(np.abs(0.5 * (grid[change] + grid[change + 1]) - f_near))]
    return float(grid[i]), float(grid[i + 1])


def steady_state_frequency(drive: DriveSet, f_setpoint_hz: float,
                           load: LoadModel | Sequence[LoadModel] | None = None) -> SteadyState:
    """Steady-state frequency of a set feeding an island load.

    With integral action (``ki > 0``) the speed settles on the reference, so ``f = f_set - droop f_rated
    P(f)/P_rated`` (droop) or ``f = f_set`` (isochronous); with ``ki = 0`` the proportional loop adds its own
    offset ``kp (w_ref - w) = T``. If the torque needed exceeds the limit the set settles where the limit
    torque carries the load (lower frequency).

    Raises
    ------
    ModelInputError
        When no operating point exists (the load exceeds what the torque limit can carry at any speed).
    """
    p_load = _as_load(load)
    f_hi = 3.0 * max(f_setpoint_hz, drive.rated_frequency_hz)
    f_lo = 1e-6 * drive.rated_frequency_hz

    def balance(f: float) -> float:
        w = float(drive.shaft_speed(f))
        f_ref = float(drive.reference_frequency(f_setpoint_hz, p_load(np.asarray(f))))
        if drive.ki > 0:
            return f_ref - f
        torque = float(np.clip(drive.kp * (TWO_PI * f_ref / drive.pole_pairs - w),
                               -drive.torque_limit_nm, drive.torque_limit_nm))
        return torque - _required_torque(drive, p_load, f)

    bracket = _bracket_near(balance, f_lo, f_hi, f_setpoint_hz)
    if bracket is None:
        msg = f"{drive.name}: no steady operating point between {f_lo:g} and {f_hi:g} Hz for this load"
        raise ModelInputError(msg)
    f_ss = bracket[0] if bracket[0] == bracket[1] else brentq(balance, *bracket, xtol=1e-13,
                                                              rtol=4 * np.finfo(float).eps, maxiter=500)
    torque = _required_torque(drive, p_load, f_ss)
    limited = abs(torque) > drive.torque_limit_nm
    if limited:
        limit = math.copysign(drive.torque_limit_nm, torque)

        def at_limit(f: float) -> float:
            return limit - _required_torque(drive, p_load, f)

        bracket = _bracket_near(at_limit, f_lo, f_ss, f_ss) if torque > 0 else _bracket_near(at_limit, f_ss, f_hi, f_ss)
        if bracket is None:
            msg = (f"{drive.name}: the load needs more than the torque limit ({drive.torque_limit_nm:g} N m) at "
                   "every speed; the set would stall")
            raise ModelInputError(msg)
        f_ss = bracket[0] if bracket[0] == bracket[1] else brentq(at_limit, *bracket, xtol=1e-13, maxiter=500)
        torque = limit
    return SteadyState(float(f_ss), float(p_load(np.asarray(f_ss))), float(torque), limited)


def steady_state_on_bus(drive: DriveSet, f_setpoint_hz: float, f_bus_hz: float) -> SteadyState:
    """Steady state of a set paralleled with an infinite bus: the frequency stays ``f_bus``; the power moves.

    Droop with integral action: ``P = P_rated (f_set - f_bus) / (droop f_rated)``; isochronous with integral
    action and ``f_set != f_bus``: the integrator runs the torque to its limit; ``ki = 0``: ``kp (w_ref - w)``.
    The torque limit clips the result.
    """
    w = float(drive.shaft_speed(f_bus_hz))
    loss = drive.friction_nms * w
    runs_to_limit = drive.ki > 0 and drive.effective_droop == 0 and f_setpoint_hz != f_bus_hz
    if drive.ki > 0 and drive.effective_droop > 0:
        p = drive.rating_va * (f_setpoint_hz - f_bus_hz) / (drive.effective_droop * drive.rated_frequency_hz)
        torque = p / w + loss
    elif drive.ki > 0:
        torque = math.copysign(drive.torque_limit_nm, f_setpoint_hz - f_bus_hz) if f_setpoint_hz != f_bus_hz else loss
    else:
        # kp (w_set - c P - w) = P/w + B w, linear in P with c = droop f_rated 2 pi / (p P_rated)
        c = TWO_PI * drive.effective_droop * drive.rated_frequency_hz / (drive.pole_pairs * drive.rating_va)
        w_set = float(drive.shaft_speed(f_setpoint_hz))
        p = (drive.kp * (w_set - w) - loss) / (drive.kp * c + 1.0 / w)
        torque = p / w + loss
    limited = runs_to_limit or abs(torque) > drive.torque_limit_nm
    torque = float(np.clip(torque, -drive.torque_limit_nm, drive.torque_limit_nm))
    return SteadyState(float(f_bus_hz), (torque - loss) * w, torque, limited)


# -- time domain ---------------------------------------------------------------------------------
@dataclass(frozen=True)
class DriveResponse:
    """A simulated response: arrays on a uniform time grid (t = 0 at the event) and its metrics.

    ``nadir_hz`` is the extreme frequency in the direction of the disturbance; ``overshoot_hz`` the
    largest excursion beyond ``f_final_hz`` on the other side after the nadir (the controller's recovery
    overshoot; 0 for a monotonic response); ``settling_time_s`` the time after which the frequency stays
    within ``band_hz`` of ``f_final_hz`` (nan if it has not settled by the end).
    """

    time_s: NDArray[np.float64]
    frequency_hz: NDArray[np.float64]
    torque_nm: NDArray[np.float64]
    power_w: NDArray[np.float64]
    f_initial_hz: float
    f_final_hz: float
    nadir_hz: float
    nadir_time_s: float
    settling_time_s: float
    overshoot_hz: float
    band_hz: float
    angle_deg: NDArray[np.float64] | None = None  # rotor angle against the bus (electrical), bus runs only

    def metrics(self) -> dict[str, float]:
        """Registered metric names: ``f_nadir``, ``settling_time``, ``overshoot``."""
        return {"f_nadir": self.nadir_hz, "settling_time": self.settling_time_s, "overshoot": self.overshoot_hz}


def response_metrics(t_s: ArrayLike, f_hz: ArrayLike, f_initial_hz: float, f_final_hz: float,
                     band_hz: float = 0.02) -> tuple[float, float, float, float]:
    """Nadir, its time, settling time and overshoot of a frequency trajectory (see :class:`DriveResponse`).

    Returns
    -------
    (nadir_hz, nadir_time_s, settling_time_s, overshoot_hz)
    """
    t = np.asarray(t_s, dtype=float)
    f = np.asarray(f_hz, dtype=float)
    if band_hz <= 0:
        msg = f"band_hz: expected a positive settling band in Hz, found {band_hz!r}"
        raise ModelInputError(msg)
    i_nadir = int(np.argmax(np.abs(f - f_initial_hz)))
    nadir = float(f[i_nadir])
    if math.isnan(f_final_hz):
        return nadir, float(t[i_nadir]), math.nan, math.nan
    direction = np.sign(nadir - f_initial_hz)
    # only a response that went beyond the final value can overshoot it on the way back
    beyond = direction != 0 and np.sign(nadir - f_final_hz) == direction
    overshoot = float(max(0.0, np.max(-direction * (f[i_nadir:] - f_final_hz)))) if beyond else 0.0
    outside = np.nonzero(np.abs(f - f_final_hz) > band_hz)[0]
    if outside.size == 0:
        settling = 0.0
    elif outside[-1] == f.size - 1:
        settling = math.nan
    else:
        settling = float(t[outside[-1] + 1])
    return nadir, float(t[i_nadir]), settling, overshoot


def _torque(drive: DriveSet, omega: NDArray[np.float64], x: NDArray[np.float64], p_e: NDArray[np.float64],
            f_set: float) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Drive torque and integrator rate (back-calculation anti-windup) for states ``omega``, ``x``.

    ``dx/dt = e + (T - u) / (ki T_t)``: while the torque is saturated the integrator is pulled back so that
    ``u`` stays near the limit. Unlike switching the integrator off (clamping), this keeps the right-hand side
    continuous, so the ODE solver does not chatter along the saturation boundary.
    """
    omega_ref = TWO_PI * drive.reference_frequency(f_set, p_e) / drive.pole_pairs
    err = omega_ref - omega
    u = drive.kp * err + drive.ki * x
    lim = drive.torque_limit_nm
    torque = np.clip(u, -lim, lim)
    if drive.ki == 0:
        return torque, err
    return torque, err + (torque - u) / (drive.ki * drive.tracking_time_s)


def _initial_integrator(drive: DriveSet, f_set: float, ss: SteadyState) -> float:
    if drive.ki == 0:
        return 0.0
    if ss.torque_limited:
        return math.copysign(drive.torque_limit_nm, ss.torque_nm) / drive.ki
    return ss.torque_nm / drive.ki  # zero speed error in steady state


def simulate_load_step(drive: DriveSet, f_setpoint_hz: float, load_before: LoadModel | Sequence[LoadModel] | None,
                       load_after: LoadModel | Sequence[LoadModel] | None, t_end_s: float, *,
                       f_setpoint_after_hz: float | None = None, f_initial_hz: float | None = None,
                       band_hz: float = 0.02, n_points: int = 2001, rtol: float = 1e-8) -> DriveResponse:
    """Simulate an island set from steady state with ``load_before`` after a step to ``load_after`` at t = 0.

    Parameters
    ----------
    drive
        The set.
    f_setpoint_hz
        Frequency setpoint before the step (Hz).
    load_before, load_after
        Island load models (callable ``P(f_hz) -> W``, a sequence of them summed, or None for no load).
    t_end_s
        Simulated time after the step (s).
    f_setpoint_after_hz
        Setpoint after t = 0 (Hz), for setpoint steps; default unchanged.
    f_initial_hz
        Start from this frequency instead of the steady state with ``load_before`` (the integrator then holds
        the torque ``load_before`` needs there); for sets without a steady state (no speed control).
    band_hz
        Settling band (Hz).
    n_points
        Points of the uniform output grid.
    rtol
        Relative tolerance of :func:`scipy.integrate.solve_ivp`.
    """
    if not (t_end_s > 0 and n_points >= 3):
        msg = f"expected t_end_s > 0 and n_points >= 3, found {t_end_s!r}, {n_points!r}"
        raise ModelInputError(msg)
    before, after = _as_load(load_before), _as_load(load_after)
    f_set2 = f_setpoint_hz if f_setpoint_after_hz is None else f_setpoint_after_hz
    if f_initial_hz is None:
        ss0 = steady_state_frequency(drive, f_setpoint_hz, before)
    else:
        needed = _required_torque(drive, before, f_initial_hz)
        ss0 = SteadyState(f_initial_hz, float(before(np.asarray(f_initial_hz))), needed,
                          abs(needed) > drive.torque_limit_nm)
    try:
        f_final = steady_state_frequency(drive, f_set2, after).frequency_hz
    except ModelInputError:
        f_final = math.nan  # no steady state (uncontrolled set, or it stalls): metrics that need one are nan
    y0 = [float(drive.shaft_speed(ss0.frequency_hz)), _initial_integrator(drive, f_setpoint_hz, ss0)]

    def rhs(_t: float, y: NDArray[np.float64]) -> list[float]:
        omega, x = np.asarray(y[0]), np.asarray(y[1])
        p_e = np.asarray(after(drive.frequency(omega)), dtype=float)
        torque, dx = _torque(drive, omega, x, p_e, f_set2)
        domega = (torque - p_e / omega - drive.friction_nms * omega) / drive.inertia_kgm2
        return [float(domega), float(dx)]

    t = np.linspace(0.0, t_end_s, n_points)
    sol = solve_ivp(rhs, (0.0, t_end_s), y0, t_eval=t, rtol=rtol, atol=1e-10, max_step=t_end_s / 200)
    if not sol.success:  # pragma: no cover - solver failure is reported, not hidden
        msg = f"{drive.name}: the simulation failed: {sol.message}"
        raise ModelInputError(msg)
    omega, x = sol.y
    f = drive.frequency(omega)
    p_e = np.asarray(after(f), dtype=float)
    torque, _ = _torque(drive, omega, x, p_e, f_set2)
    nadir, t_nadir, settle, over = response_metrics(t, f, ss0.frequency_hz, f_final, band_hz)
    return DriveResponse(t, f, torque, p_e, ss0.frequency_hz, f_final, nadir, t_nadir, settle, over, band_hz)


def synchronizing_power_max(emf_v: float, v_bus_v: float, x_ohm: float) -> float:
    """Largest synchronizing power ``E V / X`` between an EMF and a bus through reactance X (W, single phase)."""
    if x_ohm <= 0:
        msg = f"x_ohm: expected a positive reactance between the EMF and the bus, found {x_ohm!r}"
        raise ModelInputError(msg)
    return emf_v * v_bus_v / x_ohm


def simulate_closing(drive: DriveSet, f_setpoint_hz: float, f_bus_hz: float, dphi_deg: float, p_max_w: float,
                     t_end_s: float, *, damping_w_per_hz: float = 0.0, band_hz: float = 0.02, n_points: int = 2001,
                     rtol: float = 1e-8) -> DriveResponse:
    """Simulate an unloaded set closing onto an infinite bus (the mains reference) at t = 0.

    Parameters
    ----------
    drive
        The incoming set; before the close it runs unloaded at its steady speed for ``f_setpoint_hz``.
    f_setpoint_hz
        The set's frequency setpoint (Hz); slip at the close is its no-load frequency minus ``f_bus_hz``.
    f_bus_hz
        Bus frequency (Hz), which the set cannot move.
    dphi_deg
        Phase difference at the close, incoming minus running (electrical deg).
    p_max_w
        Synchronizing power amplitude ``E V / X`` (W), e.g. from :func:`synchronizing_power_max`.
    damping_w_per_hz
        Asynchronous (damper-winding) power per Hz of slip against the bus (W/Hz); 0 leaves only the speed
        loop's own damping.
    t_end_s, band_hz, n_points, rtol
        As in :func:`simulate_load_step`.

    Returns
    -------
    DriveResponse
        With ``angle_deg`` (rotor angle against the bus; beyond +-180 deg the set has slipped a pole) and
        ``power_w`` the power delivered to the bus.
    """
    if not (p_max_w > 0 and t_end_s > 0 and n_points >= 3):
        msg = f"expected p_max_w > 0, t_end_s > 0 and n_points >= 3, found {p_max_w!r}, {t_end_s!r}, {n_points!r}"
        raise ModelInputError(msg)
    ss0 = steady_state_frequency(drive, f_setpoint_hz, None)
    y0 = [float(drive.shaft_speed(ss0.frequency_hz)), _initial_integrator(drive, f_setpoint_hz, ss0),
          math.radians(dphi_deg)]

    def rhs(_t: float, y: NDArray[np.float64]) -> list[float]:
        omega, x, delta = np.asarray(y[0]), np.asarray(y[1]), y[2]
        f_now = float(drive.frequency(omega))
        p_e = np.asarray(p_max_w * np.sin(delta) + damping_w_per_hz * (f_now - f_bus_hz))
        torque, dx = _torque(drive, omega, x, p_e, f_setpoint_hz)
        domega = (torque - p_e / omega - drive.friction_nms * omega) / drive.inertia_kgm2
        ddelta = TWO_PI * (f_now - f_bus_hz)
        return [float(domega), float(dx), ddelta]

    t = np.linspace(0.0, t_end_s, n_points)
    sol = solve_ivp(rhs, (0.0, t_end_s), y0, t_eval=t, rtol=rtol, atol=1e-10, max_step=t_end_s / 400)
    if not sol.success:  # pragma: no cover
        msg = f"{drive.name}: the simulation failed: {sol.message}"
        raise ModelInputError(msg)
    omega, x, delta = sol.y
    f = drive.frequency(omega)
    p_e = p_max_w * np.sin(delta) + damping_w_per_hz * (f - f_bus_hz)
    torque, _ = _torque(drive, omega, x, p_e, f_setpoint_hz)
    nadir, t_nadir, settle, over = response_metrics(t, f, ss0.frequency_hz, f_bus_hz, band_hz)
    return DriveResponse(t, f, torque, p_e, ss0.frequency_hz, f_bus_hz, nadir, t_nadir, settle, over, band_hz,
                         angle_deg=np.degrees(delta))


# -- comparison with a measured trend ------------------------------------------------------------
@dataclass(frozen=True)
class TrendComparison:
    """Measured minus simulated frequency at the measured times."""

    rms_error_hz: float
    max_error_hz: float  # largest |error|
    t_max_error_s: float
    n_points: int


def compare_with_trend(t_sim_s: ArrayLike, f_sim_hz: ArrayLike, t_meas_s: ArrayLike, f_meas_hz: ArrayLike,
                       time_offset_s: float = 0.0) -> TrendComparison:
    """Compare a measured per-cycle frequency trend with a simulation (linear interpolation of the simulation).

    ``time_offset_s`` is subtracted from the measured times to put the event at the simulation's t = 0.
    """
    ts, fs = np.asarray(t_sim_s, dtype=float), np.asarray(f_sim_hz, dtype=float)
    tm = np.asarray(t_meas_s, dtype=float) - time_offset_s
    fm = np.asarray(f_meas_hz, dtype=float)
    if tm.shape != fm.shape or tm.ndim != 1 or tm.size == 0:
        msg = f"compare_with_trend: expected equal 1-D measured arrays, found {tm.shape} and {fm.shape}"
        raise ModelInputError(msg)
    if tm.min() < ts[0] - 1e-12 or tm.max() > ts[-1] + 1e-12:
        msg = (f"compare_with_trend: measured times {tm.min():g} .. {tm.max():g} s (after the offset) fall outside "
               f"the simulation's {ts[0]:g} .. {ts[-1]:g} s")
        raise ModelInputError(msg)
    err = fm - np.interp(tm, ts, fs)
    i = int(np.argmax(np.abs(err)))
    return TrendComparison(float(np.sqrt(np.mean(err**2))), float(abs(err[i])), float(tm[i] + time_offset_s),
                           int(tm.size))


# -- linear load-frequency model (grid-governor reference) ------------------------------------------
def lfc_isolated_area(h_s: float, d_pu: float, r_pu: float, tau_g_s: float, tau_t_s: float
                      ) -> signal.TransferFunction:
    """Transfer function ``dw(s) / dP_L(s)`` (pu/pu) of an isolated area with primary control.

    ``dw/dP_L = -(1 + tau_g s)(1 + tau_t s) / ((2 H s + D)(1 + tau_g s)(1 + tau_t s) + 1/R)``: a first-order
    governor and turbine, inertia constant H (s), load damping D and droop R (pu).
    """
    if h_s <= 0 or r_pu <= 0 or d_pu < 0 or tau_g_s < 0 or tau_t_s < 0:
        msg = f"lfc_isolated_area: expected H > 0, R > 0, D >= 0, lags >= 0; found {h_s}, {r_pu}, {d_pu}"
        raise ModelInputError(msg)
    lags = np.polymul([tau_g_s, 1.0], [tau_t_s, 1.0])
    den = np.polyadd(np.polymul([2.0 * h_s, d_pu], lags), [1.0 / r_pu])
    return signal.TransferFunction(-lags, den)


def lfc_steady_state(delta_p_pu: float, d_pu: float, r_pu: float | Sequence[float]) -> float:
    """Steady frequency deviation ``-dP_L / (D + sum 1/R_i)`` (pu); R = 0 stands for isochronous (returns 0)."""
    rs = np.atleast_1d(np.asarray(r_pu, dtype=float))
    if np.any(rs == 0):
        return 0.0
    return float(-delta_p_pu / (d_pu + np.sum(1.0 / rs)))


@dataclass(frozen=True)
class DrivePerUnit:
    """A drive and its load as the per-unit constants of a load-frequency model (base = set rating)."""

    h_s: float  # inertia constant 0.5 J w0^2 / S (s)
    d_pu: float  # load damping (incl. friction) dP/df * f0 / S
    r_pu: float  # droop; 0 for isochronous with integral action
    s_base_va: float
    f0_hz: float


def drive_per_unit(drive: DriveSet, load: LoadModel | Sequence[LoadModel] | None, f0_hz: float) -> DrivePerUnit:
    """Map a drive at ``f0_hz`` to ``H``, ``D``, ``R`` of :func:`lfc_isolated_area`.

    With integral action the steady state follows the droop (``R = droop``); a proportional-only isochronous
    loop is itself a droop without lag, ``R = S / (kp w0^2 - P_m0)`` with ``P_m0`` the operating shaft power
    (the drive then reduces to the model with ``tau_g = tau_t = 0``). A proportional-only loop with droop
    has no single-R reduction and is refused.
    """
    p_load = _as_load(load)
    s = drive.rating_va
    w0 = float(drive.shaft_speed(f0_hz))
    h = 0.5 * drive.inertia_kgm2 * w0**2 / s
    df = 1e-6 * f0_hz
    dpdf = float(p_load(np.asarray(f0_hz + df)) - p_load(np.asarray(f0_hz - df))) / (2 * df)
    d = dpdf * f0_hz / s + 2.0 * drive.friction_nms * w0**2 / s
    if drive.ki > 0:
        r = drive.effective_droop
    elif drive.effective_droop == 0 and drive.kp > 0:
        # dP_m = d(T w) = (T0 - kp w0) dw: the operating torque T0 itself gives back power as the speed falls
        p_m0 = float(p_load(np.asarray(f0_hz))) + drive.friction_nms * w0**2
        gain = drive.kp * w0**2 - p_m0
        if gain <= 0:
            msg = f"{drive.name}: kp w0^2 = {drive.kp * w0**2:g} W does not exceed the operating power {p_m0:g} W"
            raise ModelInputError(msg)
        r = s / gain
    else:
        msg = (f"{drive.name}: a proportional-only loop with droop (or no speed control at all) has no single "
               "droop constant R; use the time-domain simulation")
        raise ModelInputError(msg)
    return DrivePerUnit(h, d, r, s, f0_hz)


# -- load sharing ----------------------------------------------------------------------------------
@dataclass(frozen=True)
class DroopSource:
    """A source as the network solver sees it for load sharing: rating, droop (0 = isochronous), rated f."""

    name: str
    p_rated_w: float
    droop: float
    f_rated_hz: float

    @property
    def stiffness_w_per_hz(self) -> float:
        """``P_rated / (droop f_rated)`` (W/Hz); ``inf`` for an isochronous source."""
        return math.inf if self.droop == 0 else self.p_rated_w / (self.droop * self.f_rated_hz)

    @classmethod
    def from_drive(cls, drive: DriveSet) -> DroopSource:
        """The droop source of a drive (its effective droop: 0 in isochronous mode)."""
        return cls(drive.name, drive.rating_va, drive.effective_droop, drive.rated_frequency_hz)


def droop_power_w(f_hz: ArrayLike, f_setpoint_hz: float, p_rated_w: float, droop: float,
                  f_rated_hz: float) -> NDArray[np.float64]:
    """Power (W) of a droop source at the common frequency ``f_hz``: ``P_rated (f_set - f)/(droop f_rated)``."""
    if droop <= 0:
        msg = "droop_power_w: an isochronous source (droop 0) has no power-frequency line"
        raise ModelInputError(msg)
    return p_rated_w * (f_setpoint_hz - np.asarray(f_hz, dtype=float)) / (droop * f_rated_hz)


@dataclass(frozen=True)
class LoadSharing:
    """How a load change is shared: the frequency change and each source's pick-up (W)."""

    delta_p_w: float
    delta_f_hz: float
    frequency_hz: float
    shares_w: dict[str, float]
    bus_share_w: float
    damping_share_w: float  # the load's own reduction, -D df
    stiffness_w_per_hz: float


def share_load_change(delta_p_w: float, sources: Sequence[DroopSource], f0_hz: float, *,
                      load_damping_w_per_hz: float = 0.0, infinite_bus: bool = False) -> LoadSharing:
    """Share a load change ``delta_p_w`` among droop sources (and an optional infinite bus), closed form.

    ``df = -dP / (sum_i P_rated_i / (droop_i f_rated_i) + D)``; source ``i`` picks up ``-K_i df``; the load
    itself gives back ``-D df``. An infinite bus, or a single isochronous source, holds ``df = 0`` and takes
    the whole change.

    Raises
    ------
    ModelInputError
        Two isochronous sources in parallel (their split is indeterminate), or an isochronous source on an
        infinite bus (it runs to its torque limit), or no source at all.
    """
    iso = [s.name for s in sources if s.droop == 0]
    if infinite_bus and iso:
        msg = (f"isochronous source(s) {iso} on an infinite bus cannot hold their own frequency: "
               "they run to the torque limit")
        raise ModelInputError(msg)
    if len(iso) > 1:
        msg = f"isochronous sources {iso} in parallel share a load change indeterminately; give all but one a droop"
        raise ModelInputError(msg)
    if not sources and not infinite_bus and load_damping_w_per_hz <= 0:
        msg = "share_load_change: expected at least one source, an infinite bus or load damping"
        raise ModelInputError(msg)
    if infinite_bus or iso:
        shares = {s.name: (delta_p_w if s.name in iso else 0.0) for s in sources}
        return LoadSharing(delta_p_w, 0.0, f0_hz, shares, 0.0 if iso else delta_p_w, 0.0, math.inf)
    k = np.array([s.stiffness_w_per_hz for s in sources])
    total = float(k.sum()) + load_damping_w_per_hz
    df = -delta_p_w / total
    shares = {s.name: float(-ki * df) for s, ki in zip(sources, k, strict=True)}
    return LoadSharing(delta_p_w, df, f0_hz + df, shares, 0.0, -load_damping_w_per_hz * df, total)


def island_frequency(sources: Sequence[DroopSource], setpoints_hz: Sequence[float],
                     load: LoadModel | Sequence[LoadModel]) -> tuple[float, dict[str, float]]:
    """Common island frequency of droop sources feeding a frequency-dependent load (nonlinear, exact).

    Solves ``sum_i P_rated_i (f_set_i - f) / (droop_i f_rated_i) = P_load(f)``; the closed form of
    :func:`share_load_change` is its linearization.
    """
    if len(sources) != len(setpoints_hz) or not sources or any(s.droop <= 0 for s in sources):
        msg = "island_frequency: expected one setpoint per source and droop sources only (droop > 0)"
        raise ModelInputError(msg)
    p_load = _as_load(load)

    def balance(f: float) -> float:
        gen = sum(float(droop_power_w(f, fs, s.p_rated_w, s.droop, s.f_rated_hz))
                  for s, fs in zip(sources, setpoints_hz, strict=True))
        return gen - float(p_load(np.asarray(f)))

    f_top = max(setpoints_hz)
    f = brentq(balance, 1e-6 * f_top, 3.0 * f_top, xtol=1e-13, maxiter=500)
    powers = {s.name: float(droop_power_w(f, fs, s.p_rated_w, s.droop, s.f_rated_hz))
              for s, fs in zip(sources, setpoints_hz, strict=True)}
    return float(f), powers

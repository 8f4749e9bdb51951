"""One trapped silica sphere: its three centre-of-mass modes, their rates and their motion.

Rates come from :mod:`quietwell.physics` (gas damping and heating, photon recoil,
cold-damping and parametric feedback); the motion is sampled exactly by
:mod:`quietwell_sim._exact`. The model is classical: a mode's energy
``E = m v**2/2 + m Omega0**2 x**2/2`` is exponentially distributed with mean
``hbar Omega0 (n + 1/2)``, with the occupation ``n`` and the heating rates in
quanta/s exactly as the physics core defines them.

Heating and damping per axis (all in the physics core's conventions):

* gas: damping ``gamma_gas`` (:func:`~quietwell.physics.gas_damping`), heating
  ``gamma_gas (n_th + 1/2)`` (:func:`~quietwell.physics.gas_heating_rate`);
* photon recoil: :func:`~quietwell.physics.recoil_heating_rate` with
  :func:`~quietwell.physics.scattered_power` and
  :func:`~quietwell.physics.silica_index`;
* cold damping: the force ``-m gamma_fb d(x + x_imp)/dt`` acts as extra damping
  ``gamma_fb`` plus the white force ``-m gamma_fb x_imp'``. Its one-sided PSD is
  ``m**2 gamma_fb**2 Omega**2 S_imp``, which near the resonance of a weakly coupled
  (``gamma_fb << Omega0``) mode is the white level ``m**2 gamma_fb**2 Omega0**2 S_imp``.
  A white force of one-sided PSD ``S_FF`` heats at ``S_FF/(4 m)`` J/s, so this one
  adds ``m gamma_fb**2 Omega0 S_imp/(4 hbar)`` quanta/s; with
  ``Gamma_meas = x_zpf**2/(2 S_imp) = hbar/(4 m Omega0 S_imp)`` that is
  ``gamma_fb**2/(16 Gamma_meas)``, the imprecision term of
  :func:`~quietwell.physics.cold_damping_occupation`. The Coulomb force needs a
  charge: with zero charge the feedback has no effect.
* the total enters the oscillator as velocity diffusion
  ``sigma**2 = 2 hbar Omega0 Gamma_total/m`` (m**2/s**3), so that the stationary
  mean energy is ``hbar Omega0 Gamma_total/gamma_total``.

Feedback voltage and saturation. The cold-damping force ``F = m gamma_fb v``
(velocity ``v``) comes from electrodes at distance ``d`` with geometry factor
``kappa`` (field ``kappa V/d``) acting on the charge ``q e``, so the electrode
needs ``V = m gamma_fb v d/(q e kappa)``; its amplifier clips at ``V_max``
(:meth:`Particle.set_electrodes`; none set: no limit). The clipped force
``-clip(m gamma_fb v, F_max)`` is replaced by its equivalent linear damping for a
Gaussian (thermal-state) velocity of variance ``sigma_v**2 = E/m``: with
``u = v_lim/sigma_v`` and ``v_lim = F_max/(m gamma_fb)`` the power it removes,
``<F v>``, is ``m gamma_fb sigma_v**2 erf(u/sqrt 2)``, so the damping is
``gamma_fb erf(u/sqrt 2)`` and the output sits at the limit a fraction
``erfc(u/sqrt 2)`` of the time (statistical linearisation of a saturation,
common practice, no source). ``E`` is solved self-consistently with the steady
state (the transient after a gain step lasts about ``E/(F_max v)``, microseconds
to milliseconds, much shorter than a record); the feedback's noise heating uses the
same reduced gain, and a parametric gain does not enter the solution. A charge of
zero needs an infinite voltage: no damping, saturated all the time. A drive held
at the rail (:meth:`Particle.hold_drive`: an excess input on the feedback
electronics) gives a constant force and no damping on that axis: below the loss
pressure the axis becomes unstable as without feedback. The simulated feedback
voltage carries no imprecision noise (the loop's bandwidth is not modelled).

Loss (phenomenological model). Below the setup's loss pressure an axis with no
feedback (no cold damping and no cooling parametric gain) becomes unstable: its
net damping is replaced by ``-1/instability_time`` (an anti-damping that stands in
for the non-linear heating mechanisms seen in experiments, which are not modelled),
while its heating stays, except that the gas part is capped at ``k_B T`` per
instability time (without the cap a zero net damping at, say, 0.5 mbar would
lose the particle in milliseconds). Its energy then grows as
``exp(t/instability_time)``; from room temperature to a trap depth of 3e4 K takes
about 4 instability times (about 80 s with the default 20 s), from a feedback-cooled
state in ultra-high vacuum about 8 (under 3 minutes). The truth's
``total_heating`` reports the capped value. When any axis's energy exceeds the trap depth the
particle is lost for good: the motion stops and the detector sees only noise.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from numpy.typing import ArrayLike

from quietwell import InputError, LimitError
from quietwell import physics as ph

from ._exact import ExactStep, exact_step, sample_linear, sample_parametric

__all__ = [
    "ParticleParams",
    "TrapParams",
    "AxisRates",
    "GroundTruth",
    "Particle",
    "electrode_field",
]


def _vec3(value: ArrayLike, name: str, unit: str) -> np.ndarray:
    arr = np.asarray(value, dtype=float)
    if arr.ndim == 0:
        arr = np.full(3, float(arr))
    if arr.shape != (3,) or not np.all(np.isfinite(arr)):
        raise InputError(
            f"{name}={value!r} must be a finite number or 3 numbers (x, y, z) in {unit}"
        )
    return arr


def _frozen(arr: np.ndarray) -> np.ndarray:
    out = np.array(arr, dtype=float)
    out.setflags(write=False)
    return out


def electrode_field(voltage: float, distance: float, geometry_factor: float = 1.0) -> float:
    """Field amplitude ``E0 = kappa V0/d`` in V/m between drive electrodes.

    ``voltage`` in V (amplitude), ``distance`` in m (> 0), ``geometry_factor``
    ``kappa`` dimensionless (1 for ideal plates).
    """
    if not distance > 0:
        raise InputError(f"{distance=} m must be > 0; give the electrode distance in m")
    return geometry_factor * voltage / distance


@dataclass(frozen=True)
class ParticleParams:
    """The trapped sphere (SI units).

    Attributes
    ----------
    radius : float
        Radius in m (default 75 nm, a 150 nm diameter sphere).
    density : float
        Density in kg/m**3 (default 1850, typical of spheres grown in solution).
    charge : int
        Net charge in elementary charges (default 7).
    temperature : float
        Gas and internal temperature in K (default 295).
    refractive_index : float or None
        Index at the trap wavelength; ``None`` uses fused silica's Sellmeier fit.
    """

    radius: float = 75e-9
    density: float = 1850.0
    charge: int = 7
    temperature: float = 295.0
    refractive_index: float | None = None

    def __post_init__(self) -> None:
        if not (self.radius > 0 and self.radius < 1e-5):
            raise InputError(f"radius={self.radius!r} m must be in (0, 1e-5) m; give metres")
        if not (100.0 < self.density < 30000.0):
            raise InputError(f"density={self.density!r} kg/m**3 must be in (100, 30000)")
        if int(self.charge) != self.charge:
            raise InputError(f"charge={self.charge!r} must be an integer number of e")
        if not self.temperature > 0:
            raise InputError(f"temperature={self.temperature!r} K must be > 0")


@dataclass(frozen=True)
class TrapParams:
    """The optical trap (SI units).

    Attributes
    ----------
    wavelength : float
        Trap wavelength in m (default 1064 nm).
    power : float
        Reference (and initial) power in the focus in W (default 0.3).
    waist : float
        Focal waist in m (default 0.8 um).
    frequencies : tuple of float
        Trap frequencies (x, y, z) in Hz at ``power`` (default 152, 171, 48 kHz; x along
        the polarization, z along propagation). They scale as ``sqrt(P/power)``.
    max_power : float
        Largest settable power in W (default 1.0).
    trap_depth : float
        Trap depth in K (energy/k_B) at ``power``; scales with ``P`` (default 3e4 K).
    loss_pressure : float
        Pressure in Pa below which an axis without feedback becomes unstable
        (default 100 Pa = 1 mbar).
    instability_time : float
        e-folding time in s of the energy of an unstable axis (default 20 s).
    """

    wavelength: float = 1064e-9
    power: float = 0.3
    waist: float = 0.8e-6
    frequencies: tuple[float, float, float] = (152e3, 171e3, 48e3)
    max_power: float = 1.0
    trap_depth: float = 3e4
    loss_pressure: float = 100.0
    instability_time: float = 20.0

    def __post_init__(self) -> None:
        if not (200e-9 < self.wavelength < 20e-6):
            raise InputError(f"wavelength={self.wavelength!r} m must be in (200e-9, 20e-6) m")
        if not (0 < self.power <= self.max_power):
            raise InputError(
                f"power={self.power!r} W must be in (0, max_power={self.max_power!r}] W"
            )
        if not self.waist > 0:
            raise InputError(f"waist={self.waist!r} m must be > 0")
        f = np.asarray(self.frequencies, dtype=float)
        if f.shape != (3,) or not np.all(f > 0):
            raise InputError(f"frequencies={self.frequencies!r} must be 3 positive Hz values")
        if not self.trap_depth > 0:
            raise InputError(f"trap_depth={self.trap_depth!r} K must be > 0")
        if not self.loss_pressure >= 0:
            raise InputError(f"loss_pressure={self.loss_pressure!r} Pa must be >= 0")
        if not self.instability_time > 0:
            raise InputError(f"instability_time={self.instability_time!r} s must be > 0")


@dataclass(frozen=True)
class AxisRates:
    """Damping (1/s) and heating (quanta/s) of the three axes at one state; arrays (x, y, z)."""

    omega0: np.ndarray
    gas_damping: np.ndarray
    feedback_damping: np.ndarray
    instability_damping: np.ndarray
    total_damping: np.ndarray
    gas_heating: np.ndarray
    recoil_heating: np.ndarray
    feedback_heating: np.ndarray
    total_heating: np.ndarray
    parametric_beta: np.ndarray
    steady_energy: np.ndarray
    unstable: np.ndarray
    feedback_saturation: np.ndarray

    @property
    def sigma2(self) -> np.ndarray:
        """Velocity diffusion in m**2/s**3 per unit ``hbar Omega0/m`` (multiply by that)."""
        return 2.0 * self.total_heating


@dataclass(frozen=True)
class GroundTruth:
    """What the simulation knows and an experiment has to measure (SI units).

    Per-axis fields are read-only arrays ordered (x, y, z).

    Attributes
    ----------
    time : float
        Simulated time in s.
    radius, mass, density : float
        m, kg, kg/m**3.
    charge : int
        Net charge in elementary charges.
    frequencies : ndarray
        Trap frequencies in Hz at the current laser power.
    pressure : float
        True pressure in Pa.
    laser_power : float
        W.
    gas : str
        Background gas.
    gas_damping, feedback_damping, instability_damping, total_damping : ndarray
        Energy damping rates in 1/s (feedback counts only with non-zero charge and
        is the saturated value when the electrode voltage clips; instability is the
        phenomenological loss model, see module docs).
    gas_heating, recoil_heating, feedback_heating, total_heating : ndarray
        Heating rates in quanta/s (the bath's 1/2 included in the gas term).
    parametric_gain : ndarray
        ``eta`` in 1/m**2.
    occupation : ndarray
        Ensemble-mean occupation now (tracked exactly for linear segments; under
        parametric feedback a relaxation at the linearised rate, an approximation).
    steady_occupation : ndarray
        Occupation the current settings lead to (inf if unstable).
    energy : ndarray
        Energy of this particular realisation's modes in J.
    trap_depth : float
        J.
    lost : bool
        True once the particle has left the trap.
    lost_time : float or None
        Simulated time of the loss in s.
    feedback_saturation : ndarray
        Fraction of the time (0..1) each axis's feedback voltage sits at its limit.
    """

    time: float
    radius: float
    mass: float
    density: float
    charge: int
    frequencies: np.ndarray
    pressure: float
    laser_power: float
    gas: str
    gas_damping: np.ndarray
    feedback_damping: np.ndarray
    instability_damping: np.ndarray
    total_damping: np.ndarray
    gas_heating: np.ndarray
    recoil_heating: np.ndarray
    feedback_heating: np.ndarray
    total_heating: np.ndarray
    parametric_gain: np.ndarray
    occupation: np.ndarray
    steady_occupation: np.ndarray
    energy: np.ndarray
    trap_depth: float
    lost: bool
    lost_time: float | None = None
    feedback_saturation: np.ndarray = field(default_factory=lambda: _frozen(np.zeros(3)))

    @property
    def omega0(self) -> np.ndarray:
        """Angular trap frequencies in rad/s."""
        return ph.angular(self.frequencies)


@dataclass
class _Settings:
    pressure: float
    power: float
    gamma_fb: np.ndarray = field(default_factory=lambda: np.zeros(3))
    eta: np.ndarray = field(default_factory=lambda: np.zeros(3))
    phase: np.ndarray = field(default_factory=lambda: np.zeros(3))
    s_imp: np.ndarray = field(default_factory=lambda: np.full(3, 1e-26))
    drive_frequency: float = 0.0
    drive_field: np.ndarray = field(default_factory=lambda: np.zeros(3))


class Particle:
    """A charged silica sphere in an optical trap; three uncoupled modes (x, y, z).

    Parameters
    ----------
    params : ParticleParams
    trap : TrapParams
    rng : numpy.random.Generator
        The particle's own random stream (initial state and motion).
    gas : str
        Background gas, a key of :data:`quietwell.physics.GASES`.
    pressure : float
        Initial pressure in Pa (> 0).
    time : float
        Initial simulated time in s.

    Notes
    -----
    The initial state is drawn from the stationary distribution at ``pressure``
    with no feedback (if that state is unstable, from the thermal one).
    """

    def __init__(
        self,
        params: ParticleParams,
        trap: TrapParams,
        rng: np.random.Generator,
        gas: str = "N2",
        pressure: float = 1000.0,
        time: float = 0.0,
    ) -> None:
        if gas not in ph.GASES:
            raise InputError(f"{gas=} is not a known gas; use one of {sorted(ph.GASES)}")
        self.params = params
        self.trap = trap
        self.gas = ph.GASES[gas]
        self._rng = rng
        self.mass = float(ph.sphere_mass(params.radius, params.density))
        self.charge = int(params.charge)
        self.time = float(time)
        self._set = _Settings(pressure=self._check_pressure(pressure), power=trap.power)
        self._steps: dict[tuple[float, float, float, float], ExactStep] = {}
        self.lost = False
        self.lost_time: float | None = None
        self._electrodes: tuple[float, float, float] | None = None  # (d m, kappa, V_max V)
        self._held = np.zeros(3, dtype=bool)  # drive held at the rail (fault)
        self._fb_peak = np.zeros(3)  # V, since the last drive_report
        self._fb_sat_time = np.zeros(3)  # s at the limit, since the last drive_report
        self._fb_time = 0.0  # s covered since the last drive_report
        self._last_report = (np.full(3, np.nan), np.zeros(3), 0.0)
        rates = self.rates()
        e0 = np.where(
            np.isfinite(rates.steady_energy) & (rates.steady_energy > 0),
            rates.steady_energy,
            ph.K_B * params.temperature,
        )
        self.state = np.zeros((3, 2))  # (x [m], v [m/s]) per axis
        for i in range(3):
            w = rates.omega0[i]
            sx = math.sqrt(e0[i] / (self.mass * w * w))
            sv = math.sqrt(e0[i] / self.mass)
            self.state[i] = rng.normal(0.0, 1.0, 2) * (sx, sv)
        self.mean_energy = np.array(e0, dtype=float)

    # ------------------------------------------------------------------ settings
    @staticmethod
    def _check_pressure(p: float) -> float:
        if not (math.isfinite(p) and p > 0):
            raise InputError(f"pressure={p!r} Pa must be finite and > 0")
        return float(p)

    def set_pressure(self, pressure: float) -> None:
        """Set the gas pressure in Pa (> 0) seen from now on."""
        self._set.pressure = self._check_pressure(pressure)

    def set_laser_power(self, power: float) -> None:
        """Set the power in the focus in W, within ``(0, trap.max_power]``.

        The frequencies scale as ``sqrt(P)``; the state (x, v) carries over (a
        sudden change of the spring constant), and so does the tracked mean energy
        with the matching factor ``(1 + (Omega'/Omega)**2)/2``.
        """
        if not (math.isfinite(power) and 0 < power <= self.trap.max_power):
            raise LimitError(
                f"laser power={power!r} W is outside (0, {self.trap.max_power}] W; "
                "lower it or raise max_power in the trap parameters"
            )
        ratio2 = power / self._set.power
        self.mean_energy = self.mean_energy * 0.5 * (1.0 + ratio2)
        self._set.power = float(power)

    def set_feedback_damping(self, gamma_fb: ArrayLike) -> None:
        """Set cold-damping gains, the added damping ``gamma_fb`` (1/s, >= 0), scalar or 3."""
        g = _vec3(gamma_fb, "gamma_fb", "1/s")
        if np.any(g < 0):
            raise LimitError(f"gamma_fb={g.tolist()} 1/s must be >= 0; negative gain heats")
        self._set.gamma_fb = g

    def set_parametric(self, eta: ArrayLike, phase: ArrayLike = 0.0) -> None:
        """Set parametric gain ``eta`` (1/m**2, >= 0) and phase (rad), scalar or (x, y, z)."""
        e = _vec3(eta, "eta", "1/m**2")
        if np.any(e < 0):
            raise LimitError(f"eta={e.tolist()} 1/m**2 must be >= 0; use phase=pi to heat")
        self._set.eta = e
        self._set.phase = _vec3(phase, "phase", "rad")

    def set_electrodes(
        self, distance: float, geometry_factor: float, voltage_max: float | None
    ) -> None:
        """Feedback electrodes: gap ``distance`` in m, ``geometry_factor`` kappa, limit in V.

        The field is ``kappa V/distance``; ``voltage_max`` (> 0) clips the feedback
        output (``None``: no limit). See module docs.
        """
        for name, val in (("distance", distance), ("geometry_factor", geometry_factor)):
            if not (math.isfinite(val) and val > 0):
                raise InputError(f"electrode {name}={val!r} must be finite and > 0 (SI units)")
        if voltage_max is not None and not (math.isfinite(voltage_max) and voltage_max > 0):
            raise InputError(f"electrode voltage_max={voltage_max!r} V must be finite and > 0")
        vmax = math.inf if voltage_max is None else float(voltage_max)
        self._electrodes = (float(distance), float(geometry_factor), vmax)

    def hold_drive(self, axes: ArrayLike) -> None:
        """Hold the feedback output of the axes where ``axes`` is True at its limit.

        ``axes``: 3 booleans (x, y, z). A held axis feels a constant force and no
        damping; the output reports the limit and saturation 1 (see module docs).
        """
        a = np.asarray(axes, dtype=bool)
        if a.shape != (3,):
            raise InputError(f"axes={axes!r} must be 3 booleans (x, y, z)")
        self._held = a.copy()

    def feedback_volts_per_velocity(self) -> np.ndarray:
        """Electrode volts per m/s of velocity each axis's cold damping needs (x, y, z).

        ``m gamma_fb d/(|q| e kappa)`` in V s/m with the set gains; nan without
        electrodes (:meth:`set_electrodes`), inf with zero charge and a gain.
        """
        g = self._set.gamma_fb
        if self._electrodes is None:
            return np.full(3, np.nan)
        d, kappa, _ = self._electrodes
        q = abs(self.charge) * ph.E_CHARGE * kappa
        if q == 0:
            return np.where(g > 0, np.inf, 0.0)
        return self.mass * g * d / q

    def set_imprecision(self, s_imp: ArrayLike) -> None:
        """Set the feedback imprecision ``S_imp`` (m**2/Hz, > 0), scalar or (x, y, z)."""
        s = _vec3(s_imp, "s_imp", "m**2/Hz")
        if np.any(s <= 0):
            raise InputError(f"s_imp={s.tolist()} m**2/Hz must be > 0")
        self._set.s_imp = s

    def set_drive(self, frequency: float, field: ArrayLike) -> None:
        """Drive tone: Coulomb force ``q E0 cos(2 pi f t)`` on each axis.

        ``frequency`` in Hz (>= 0), ``field`` the field amplitude in V/m, scalar or
        (x, y, z) (see :func:`electrode_field`). A zero field switches it off.
        """
        if not (math.isfinite(frequency) and frequency >= 0):
            raise InputError(f"drive {frequency=} Hz must be finite and >= 0")
        self._set.drive_frequency = float(frequency)
        self._set.drive_field = _vec3(field, "field", "V/m")

    def discharge(self, step: int) -> int:
        """Change the charge by ``step`` elementary charges (an integer, either sign).

        Returns the new charge in e.
        """
        if isinstance(step, bool) or int(step) != step:
            raise InputError(f"{step=} must be an integer number of elementary charges")
        self.charge += int(step)
        return self.charge

    # -------------------------------------------------------------------- rates
    @property
    def pressure(self) -> float:
        """Current pressure in Pa."""
        return self._set.pressure

    @property
    def laser_power(self) -> float:
        """Current power in the focus in W."""
        return self._set.power

    def omega0(self) -> np.ndarray:
        """Angular trap frequencies in rad/s at the current power."""
        scale = math.sqrt(self._set.power / self.trap.power)
        return ph.angular(self.trap.frequencies) * scale

    def trap_depth(self) -> float:
        """Trap depth in J at the current power."""
        return ph.K_B * self.trap.trap_depth * self._set.power / self.trap.power

    def rates(self) -> AxisRates:
        """Per-axis damping and heating at the current settings (see module docs)."""
        s, p, t = self._set, self.params, self.params.temperature
        w = self.omega0()
        g_gas = np.full(3, float(ph.gas_damping(p.radius, p.density, s.pressure, t, self.gas)))
        h_gas = ph.gas_heating_rate(g_gas, w, t)
        index = p.refractive_index or float(ph.silica_index(self.trap.wavelength))
        p_scat = float(
            ph.scattered_power(p.radius, index, self.trap.wavelength, s.power, self.trap.waist)
        )
        h_rec = np.array(
            [
                float(ph.recoil_heating_rate(p_scat, self.trap.wavelength, self.mass, w[i], ax))
                for i, ax in enumerate(ph.AXES)
            ]
        )
        g_meas = ph.measurement_rate(self.mass, w, s.s_imp)
        g_fb, sat = self._saturated_feedback(w, g_gas, h_gas + h_rec, g_meas)
        h_fb = g_fb**2 / (16.0 * g_meas)
        eta_eff = s.eta * np.cos(s.phase)
        unstable = (s.pressure < self.trap.loss_pressure) & (g_fb == 0) & (eta_eff <= 0)
        g_inst = np.where(unstable, -(g_gas + 1.0 / self.trap.instability_time), 0.0)
        g_tot = g_gas + g_fb + g_inst
        # Unstable axes: the gas heating that enters is capped at k_B T per instability
        # time, so the loss takes minutes at any pressure below the loss pressure.
        cap = ph.K_B * t / (ph.HBAR * w * self.trap.instability_time)
        h_tot = np.where(unstable, np.minimum(h_gas, cap), h_gas) + h_rec + h_fb
        beta = ph.parametric_beta(np.maximum(eta_eff, 0.0), self.mass, w)
        with np.errstate(divide="ignore", invalid="ignore"):
            e_lin = np.where(g_tot > 0, ph.HBAR * w * h_tot / g_tot, np.inf)
            t_eff = e_lin / ph.K_B
            e_par = ph.parametric_mean_energy(beta, np.where(g_tot > 0, g_tot, 1.0), t_eff)
        e_ss = np.where((beta > 0) & (g_tot > 0), e_par, e_lin)
        return AxisRates(
            omega0=_frozen(w),
            gas_damping=_frozen(g_gas),
            feedback_damping=_frozen(g_fb),
            instability_damping=_frozen(g_inst),
            total_damping=_frozen(g_tot),
            gas_heating=_frozen(h_gas),
            recoil_heating=_frozen(h_rec),
            feedback_heating=_frozen(h_fb),
            total_heating=_frozen(h_tot),
            parametric_beta=_frozen(beta),
            steady_energy=_frozen(e_ss),
            unstable=np.array(unstable),
            feedback_saturation=_frozen(sat),
        )

    def _saturated_feedback(
        self, w: np.ndarray, g_gas: np.ndarray, h_other: np.ndarray, g_meas: np.ndarray
    ) -> tuple[np.ndarray, np.ndarray]:
        """Feedback damping (1/s) after the voltage limit, and the saturated fraction."""
        g_set = np.array(self._set.gamma_fb, dtype=float)
        held = self._held
        vmax = math.inf if self._electrodes is None else self._electrodes[2]
        if self.charge == 0:
            sat = np.where(held | ((g_set > 0) & math.isfinite(vmax)), 1.0, 0.0)
            return np.zeros(3), sat
        g = np.where(held, 0.0, g_set)
        sat = np.where(held, 1.0, 0.0)
        if not math.isfinite(vmax):
            return g, sat
        assert self._electrodes is not None
        d, kappa, _ = self._electrodes
        f_max = abs(self.charge) * ph.E_CHARGE * kappa * vmax / d
        for i in range(3):
            if held[i] or g_set[i] <= 0:
                continue
            g[i], sat[i] = _clipped_damping(
                float(g_set[i]),
                f_max / (self.mass * float(g_set[i])),
                self.mass,
                ph.HBAR * float(w[i]),
                float(g_gas[i]),
                float(h_other[i]),
                float(g_meas[i]),
            )
        return g, sat

    # ------------------------------------------------------------ drive report
    def _account_drive(self, r: AxisRates, dt: float, v_amp: np.ndarray | None) -> None:
        """Add ``dt`` s at rates ``r`` and velocity amplitudes ``v_amp`` (m/s) to the report."""
        self._fb_time += dt
        self._fb_sat_time += r.feedback_saturation * dt
        vmax = math.inf if self._electrodes is None else self._electrodes[2]
        peak = np.zeros(3)
        if v_amp is not None and not self.lost:
            k = self.feedback_volts_per_velocity()
            with np.errstate(invalid="ignore"):
                need = np.where(np.isinf(k), np.inf, k * v_amp)
            peak = np.where(np.isnan(need), np.nan, np.minimum(need, vmax))
        peak = np.where(self._held, vmax, peak)
        self._fb_peak = np.where(np.isnan(peak), np.nan, np.fmax(self._fb_peak, peak))

    def drive_report(self) -> tuple[np.ndarray, np.ndarray, float]:
        """Feedback output since the previous report, then start a new interval.

        Returns
        -------
        peak_v : ndarray
            Largest magnitude of each axis's electrode voltage in V (at most the
            limit; nan without :meth:`set_electrodes`).
        saturation : ndarray
            Fraction of the interval (0..1) each axis sat at the limit.
        interval_s : float
            Simulated seconds covered. With no time passed the previous report is
            returned again (nothing has happened since).
        """
        if self._fb_time == 0.0:
            return self._last_report
        out = (self._fb_peak.copy(), self._fb_sat_time / self._fb_time, self._fb_time)
        self._last_report = out
        self._fb_peak = np.zeros(3)
        self._fb_sat_time = np.zeros(3)
        self._fb_time = 0.0
        return out

    def energy(self) -> np.ndarray:
        """Energy of each mode of this realisation in J (drive response included)."""
        w = self.omega0()
        x, v = self.state[:, 0], self.state[:, 1]
        return 0.5 * self.mass * (v * v + w * w * x * x)

    def truth(self) -> GroundTruth:
        """The ground truth at the current time and settings."""
        r = self.rates()
        w = r.omega0
        n_now = ph.occupation_from_energy(self.mean_energy, w)
        n_ss = ph.occupation_from_energy(r.steady_energy, w)
        return GroundTruth(
            time=self.time,
            radius=self.params.radius,
            mass=self.mass,
            density=self.params.density,
            charge=self.charge,
            frequencies=_frozen(w / (2.0 * np.pi)),
            pressure=self._set.pressure,
            laser_power=self._set.power,
            gas=self.gas.name,
            gas_damping=r.gas_damping,
            feedback_damping=r.feedback_damping,
            instability_damping=r.instability_damping,
            total_damping=r.total_damping,
            gas_heating=r.gas_heating,
            recoil_heating=r.recoil_heating,
            feedback_heating=r.feedback_heating,
            total_heating=r.total_heating,
            parametric_gain=_frozen(self._set.eta),
            occupation=_frozen(n_now),
            steady_occupation=_frozen(n_ss),
            energy=_frozen(self.energy()),
            trap_depth=self.trap_depth(),
            lost=self.lost,
            lost_time=self.lost_time,
            feedback_saturation=r.feedback_saturation,
        )

    # ------------------------------------------------------------------- motion
    def _step(self, w: float, g: float, sigma2: float, h: float) -> ExactStep:
        key = (w, g, sigma2, h)
        st = self._steps.get(key)
        if st is None:
            if len(self._steps) > 64:
                self._steps.clear()
            st = exact_step(w, g, sigma2, h)
            self._steps[key] = st
        return st

    def _drive(self, i: int, w: float, g: float) -> tuple[complex, float]:
        """Complex amplitude X (m) of the steady drive response and Omega_d (rad/s)."""
        s = self._set
        e0 = s.drive_field[i]
        if e0 == 0.0 or self.charge == 0 or self.lost:
            return 0j, 0.0
        wd = 2.0 * math.pi * s.drive_frequency
        acc = self.charge * ph.E_CHARGE * e0 / self.mass
        return acc / complex(w * w - wd * wd, g * wd), wd

    def _particular(self, x_amp: complex, wd: float, t: float) -> np.ndarray:
        ph_ = cmath_exp(wd * t)
        z = x_amp * ph_
        return np.array([z.real, (1j * wd * z).real])

    def _relax_mean(self, r: AxisRates, dt: float) -> None:
        w, g = r.omega0, r.total_damping
        e = self.mean_energy.copy()
        for i in range(3):
            if r.parametric_beta[i] > 0 and g[i] > 0:
                rate = g[i] + 2.0 * r.parametric_beta[i] * r.steady_energy[i]
                e[i] = r.steady_energy[i] + (e[i] - r.steady_energy[i]) * math.exp(-rate * dt)
            elif g[i] == 0.0:
                e[i] = e[i] + ph.HBAR * w[i] * r.total_heating[i] * dt
            else:
                e_inf = ph.HBAR * w[i] * r.total_heating[i] / g[i]
                e[i] = e_inf + (e[i] - e_inf) * math.exp(-g[i] * dt)
        self.mean_energy = e

    def _mark_lost(self, t: float) -> None:
        self.lost = True
        self.lost_time = t
        self.state[:] = 0.0

    def propagate(self, dt: float) -> None:
        """Let ``dt`` seconds pass without sampling: exact jump of each axis, O(1) cost.

        Under parametric feedback the jump uses the linearised stationary damping
        ``gamma + 2 beta <E>`` and heating that keeps ``<E>`` (an approximation; use
        :meth:`sample` for the non-linear motion itself). While an axis is unstable
        the gap is cut into steps of a quarter instability time to catch the loss.
        """
        if not (math.isfinite(dt) and dt >= 0):
            raise InputError(f"{dt=} s must be finite and >= 0")
        remaining = float(dt)
        while remaining > 0:
            r = self.rates()
            h = remaining
            if np.any(r.unstable) and not self.lost:
                h = min(h, 0.25 * self.trap.instability_time)
            if not self.lost:
                for i in range(3):
                    w, g = float(r.omega0[i]), float(r.total_damping[i])
                    heat = float(r.total_heating[i])
                    if r.parametric_beta[i] > 0 and g > 0:
                        g = g + 2.0 * float(r.parametric_beta[i] * r.steady_energy[i])
                        heat = g * float(r.steady_energy[i]) / (ph.HBAR * w)
                    sigma2 = 2.0 * ph.HBAR * w * heat / self.mass
                    st = self._step(w, g, sigma2, h)
                    xa, wd = self._drive(i, w, g)
                    y = self.state[i] - self._particular(xa, wd, self.time)
                    y = st.phi @ y + st.chol @ self._rng.standard_normal(2)
                    self.state[i] = y + self._particular(xa, wd, self.time + h)
                if np.any(self.energy() > self.trap_depth()):
                    self._mark_lost(self.time + h)
            self._account_drive(r, h, np.sqrt(2.0 * self.energy() / self.mass))
            self._relax_mean(r, h)
            self.time += h
            remaining -= h

    def sample(self, n: int, dt: float) -> np.ndarray:
        """Sample the positions of the three axes, ``n`` samples ``dt`` seconds apart.

        Linear axes are sampled exactly (:func:`~quietwell_sim._exact.sample_linear`);
        axes with parametric gain by Strang splitting
        (:func:`~quietwell_sim._exact.sample_parametric`). The drive response is
        added analytically. Settings are held fixed over the record; afterwards the
        particle's time is ``t0 + n dt`` and the state is the exact continuation.

        Returns
        -------
        ndarray, shape (3, n), float64
            Positions in m at ``t0 + k dt``; zero from the sample where the particle
            is lost on.
        """
        if int(n) != n or n < 1:
            raise InputError(f"{n=} samples must be a positive integer")
        if not (math.isfinite(dt) and dt > 0):
            raise InputError(f"{dt=} s must be finite and > 0")
        n = int(n)
        out = np.zeros((3, n))
        r = self.rates()
        t0 = self.time
        if not self.lost:
            s = self._set
            for i in range(3):
                w, g = float(r.omega0[i]), float(r.total_damping[i])
                sigma2 = 2.0 * ph.HBAR * w * float(r.total_heating[i]) / self.mass
                eta_i = float(s.eta[i])
                if eta_i > 0:
                    acc = self.charge * ph.E_CHARGE * float(s.drive_field[i]) / self.mass
                    wd = 2.0 * math.pi * s.drive_frequency
                    x, new = sample_parametric(
                        self.state[i],
                        w,
                        g,
                        sigma2,
                        dt,
                        n,
                        eta_i,
                        self._rng,
                        phase=float(s.phase[i]),
                        drive_accel=acc,
                        drive_omega=wd,
                        drive_phase=wd * t0,
                    )
                    self.state[i] = new
                    out[i] = x
                else:
                    xa, wd = self._drive(i, w, g)
                    y0 = self.state[i] - self._particular(xa, wd, t0)
                    x, y1 = sample_linear(y0, w, g, sigma2, dt, n, self._rng, out=out[i])
                    if xa != 0:
                        ph0 = wd * t0 + math.atan2(xa.imag, xa.real)
                        x += abs(xa) * np.cos(ph0 + wd * dt * np.arange(n))
                    self.state[i] = y1 + self._particular(xa, wd, t0 + n * dt)
            # Velocity amplitude ~ Omega0 times the largest excursion (narrow-band motion).
            v_amp = np.maximum(
                r.omega0 * np.abs(out).max(axis=1), np.sqrt(2.0 * self.energy() / self.mass)
            )
            # Loss: the first sample whose amplitude exceeds the trap depth's.
            x_max = np.sqrt(2.0 * self.trap_depth() / (self.mass * r.omega0**2))
            if any(max(out[i].max(), -out[i].min()) > x_max[i] for i in range(3)):
                over = np.abs(out) > x_max[:, None]
                k = int(np.argmax(over.any(axis=0)))
                out[:, k:] = 0.0
                self._mark_lost(t0 + k * dt)
            elif np.any(self.energy() > self.trap_depth()):
                self._mark_lost(t0 + n * dt)
            self._account_drive(r, n * dt, v_amp)
        else:
            self._account_drive(r, n * dt, None)
        self._relax_mean(r, n * dt)
        self.time = t0 + n * dt
        return out


def _clipped_damping(
    g_set: float, v_lim: float, mass: float, hw: float, g_gas: float, h_other: float, g_meas: float
) -> tuple[float, float]:
    """Damping (1/s) and saturated fraction of one axis's clipped cold damping.

    Solves ``E = hw (h_other + g**2/(16 g_meas))/(g_gas + g)`` with
    ``g = g_set erf(u/sqrt 2)``, ``u = v_lim sqrt(mass/E)`` for the steady energy ``E``
    (J) by bisection in ``log E`` (see module docs); ``hw = hbar Omega0`` in J,
    rates in 1/s and quanta/s, ``v_lim`` in m/s.
    """

    def gain(e: float) -> float:
        return g_set * math.erf(v_lim * math.sqrt(mass / e) / math.sqrt(2.0))

    def excess(e: float) -> float:
        ge = gain(e)
        return hw * (h_other + ge * ge / (16.0 * g_meas)) / (g_gas + ge) - e

    e_full = hw * (h_other + g_set * g_set / (16.0 * g_meas)) / (g_gas + g_set)
    u_full = v_lim * math.sqrt(mass / e_full) / math.sqrt(2.0)
    if u_full > 8.0:  # erf = 1 to double precision: no clipping
        return g_set, math.erfc(u_full)
    # excess > 0 below the smallest possible steady energy; < 0 far above every one
    lo = 0.5 * hw * h_other / (g_gas + g_set)
    hi = 2.0 * max(e_full, lo)
    for _ in range(400):
        if excess(hi) < 0:
            break
        hi *= 4.0
    for _ in range(80):
        mid = math.sqrt(lo * hi)
        if excess(mid) > 0:
            lo = mid
        else:
            hi = mid
    u = v_lim * math.sqrt(mass / math.sqrt(lo * hi)) / math.sqrt(2.0)
    return g_set * math.erf(u), math.erfc(u)


def cmath_exp(phase: float) -> complex:
    """``exp(i phase)`` for a real phase in rad."""
    return complex(math.cos(phase), math.sin(phase))

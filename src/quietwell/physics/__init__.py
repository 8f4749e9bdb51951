"""Physics core of quietwell: pure numpy/scipy formulas in SI units.

Conventions (damping, PSD normalisation, occupation, axes) are fixed in
:mod:`quietwell.physics._conventions` and nowhere else. Nothing here imports
bluesky or the simulated laboratory.
"""

from ._calibration import (
    calibration_from_psd_numerator,
    drive_amplitude,
    drive_response,
    ion_gauge_true_pressure,
    mass_from_drive,
    mass_from_slope,
    radius_from_slope,
    sideband_occupation,
    thermal_calibration,
)
from ._conventions import (
    AMU,
    AXES,
    C_LIGHT,
    E_CHARGE,
    EPS0,
    HBAR,
    K_B,
    MBAR,
    N_A,
    angular,
    effective_temperature,
    energy_from_occupation,
    energy_from_variance,
    linewidth_hz,
    occupation_from_energy,
    thermal_occupation,
)
from ._estimate import Estimate
from ._feedback import (
    cold_damping_occupation,
    cold_damping_optimum,
    measurement_rate,
    parametric_beta,
    parametric_mean_energy,
    reheating_curve,
    steady_state_occupation,
)
from ._gas import (
    DIFFUSE,
    GASES,
    N2,
    SPECULAR,
    Gas,
    damping_slope,
    epstein_damping,
    gas_damping,
    gas_heating_rate,
    knudsen_number,
    mean_free_path,
    mean_speed,
    radius_from_damping_slope,
    viscosity,
)
from ._oscillator import (
    lorentzian_psd,
    peak_psd,
    sphere_mass,
    thermal_psd,
    thermal_variance,
    zero_point_width,
)
from ._recoil import (
    RECOIL_FACTORS,
    focus_intensity,
    polarizability,
    recoil_heating_rate,
    scattered_power,
    scattering_cross_section,
    silica_index,
)

__all__ = [
    "AMU", "AXES", "C_LIGHT", "DIFFUSE", "E_CHARGE", "EPS0", "Estimate", "GASES", "Gas",
    "HBAR", "K_B", "MBAR", "N2", "N_A", "RECOIL_FACTORS", "SPECULAR",
    "angular", "calibration_from_psd_numerator", "cold_damping_occupation",
    "cold_damping_optimum", "damping_slope", "drive_amplitude", "drive_response",
    "effective_temperature", "energy_from_occupation", "energy_from_variance",
    "epstein_damping", "focus_intensity", "gas_damping", "gas_heating_rate",
    "ion_gauge_true_pressure", "knudsen_number", "linewidth_hz", "lorentzian_psd",
    "mass_from_drive", "mass_from_slope", "mean_free_path", "mean_speed",
    "measurement_rate", "occupation_from_energy", "parametric_beta",
    "parametric_mean_energy", "peak_psd", "polarizability", "radius_from_damping_slope",
    "radius_from_slope", "recoil_heating_rate", "reheating_curve", "scattered_power",
    "scattering_cross_section", "sideband_occupation", "silica_index", "sphere_mass",
    "steady_state_occupation", "thermal_calibration", "thermal_occupation", "thermal_psd",
    "thermal_variance", "viscosity", "zero_point_width",
]

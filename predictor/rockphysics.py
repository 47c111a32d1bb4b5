"""Published rock-physics relations used by the synthetic field generator.

Velocities in m/s, densities in g/cm3, porosity as a fraction.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike


def wyllie_velocity(
    porosity: ArrayLike, v_matrix: float = 5850.0, v_fluid: float = 1550.0
) -> np.ndarray:
    """Wyllie time-average: 1/V = (1 - phi)/V_matrix + phi/V_fluid (Wyllie et al. 1956)."""
    phi = np.asarray(porosity, dtype=float)
    return 1.0 / ((1.0 - phi) / v_matrix + phi / v_fluid)


def raymer_velocity(
    porosity: ArrayLike, v_matrix: float = 5850.0, v_fluid: float = 1550.0
) -> np.ndarray:
    """Raymer-Hunt-Gardner: V = (1 - phi)^2 V_matrix + phi V_fluid, valid for phi < 0.37 (Raymer et
    al. 1980)."""
    phi = np.asarray(porosity, dtype=float)
    return (1.0 - phi) ** 2 * v_matrix + phi * v_fluid


def mass_balance_density(
    porosity: ArrayLike, rho_matrix: float = 2.65, rho_fluid: float = 1.03
) -> np.ndarray:
    """Bulk density as the porosity-weighted mix of grain and fluid densities."""
    phi = np.asarray(porosity, dtype=float)
    return (1.0 - phi) * rho_matrix + phi * rho_fluid


def gardner_density(velocity: ArrayLike) -> np.ndarray:
    """Gardner et al. (1974, Geophysics 39): rho = 0.31 V^0.25 (V in m/s, rho in g/cm3)."""
    return 0.31 * np.asarray(velocity, dtype=float) ** 0.25

"""Apparent viscosity of blood in microvessels: the in-vitro and in-vivo laws of Pries et al.

In: vessel diameters (µm) and discharge haematocrits. Out: relative apparent viscosities (Pries et al.
1992, in vitro; Pries et al. 1994 / Pries & Secomb 2005, in vivo with the endothelial surface layer)
and segment viscosities in mPa·s; see :mod:`pipeline.flow.rheology` for the sources.
"""

from __future__ import annotations

import math

import numpy as np

from ..errors import InputError

__all__ = ["relative_viscosity_vitro", "relative_viscosity_vivo", "segment_viscosity_mpa_s", "vivo_viscosity_mpa_s"]


# ---------------------------------------------------------------------------
# viscosity laws
# ---------------------------------------------------------------------------

def _c_exponent(d: np.ndarray) -> np.ndarray:
    # Shape of the haematocrit dependence, Pries et al. 1992 (from memory):
    # C = (0.8 + e^(-0.075 D)) (-1 + 1 / (1 + 10^-11 D^12)) + 1 / (1 + 10^-11 D^12)
    s = 1.0 / (1.0 + 1e-11 * d**12)
    return (0.8 + np.exp(-0.075 * d)) * (-1.0 + s) + s


def _haematocrit_factor(h: np.ndarray | float, c: np.ndarray) -> np.ndarray:
    """((1 - H)^C - 1) / ((1 - 0.45)^C - 1), with its limit at C = 0.

    C changes sign near D = 8 µm, where the quotient is 0/0; its limit is
    ln(1 - H) / ln(0.55). ``expm1`` keeps the quotient accurate near there.
    """
    a = np.log1p(-np.asarray(h, dtype=float))
    b = math.log(0.55)
    c = np.asarray(c, dtype=float)
    tiny = np.abs(c) < 1e-12
    cs = np.where(tiny, 1.0, c)
    return np.where(tiny, a / b, np.expm1(cs * a) / np.expm1(cs * b))


def relative_viscosity_vitro(diameter_um, haematocrit) -> np.ndarray:
    """In-vitro relative apparent viscosity of blood in glass tubes.

    Pries AR, Neuhaus D, Gaehtgens P (1992) Am J Physiol 263:H1770 (formula
    as recalled, not checked against the paper)::

        eta_rel = 1 + (eta_045 - 1) * ((1 - H)^C - 1) / ((1 - 0.45)^C - 1)
        eta_045 = 220 e^(-1.3 D) + 3.2 - 2.44 e^(-0.06 D^0.645)
        C = (0.8 + e^(-0.075 D)) (-1 + 1 / (1 + 1e-11 D^12))
            + 1 / (1 + 1e-11 D^12)

    Parameters
    ----------
    diameter_um : float or (M,) array_like
        Tube diameter D, µm (the fit's data base spans 3.3 to 1978 µm).
    haematocrit : float or (M,) array_like
        Discharge haematocrit H_D, 0 <= H_D < 1.

    Returns
    -------
    (M,) float ndarray
        Apparent viscosity over suspending-medium (plasma) viscosity.
    """
    d = np.asarray(diameter_um, dtype=float)
    eta45 = 220.0 * np.exp(-1.3 * d) + 3.2 - 2.44 * np.exp(-0.06 * d**0.645)
    return 1.0 + (eta45 - 1.0) * _haematocrit_factor(haematocrit, _c_exponent(d))


def relative_viscosity_vivo(diameter_um, haematocrit) -> np.ndarray:
    """In-vivo relative apparent viscosity (flow resistance) of microvessels.

    Pries AR, Secomb TW, Gessner T, Sperandio MB, Gross JF, Gaehtgens P
    (1994) Circ Res 75:904 (formula as recalled, not checked against the
    paper)::

        eta_vivo = [1 + (eta*_045 - 1) * ((1 - H)^C - 1) / ((1 - 0.45)^C - 1)
                    * (D / (D - 1.1))^2] * (D / (D - 1.1))^2
        eta*_045 = 6 e^(-0.085 D) + 3.2 - 2.44 e^(-0.06 D^0.645)

    with the same C as :func:`relative_viscosity_vitro`. The
    ``(D / (D - 1.1))^2`` factors stand for a wall layer of about 1.1 µm
    that diverges as D approaches 1.1 µm.

    Parameters
    ----------
    diameter_um : float or (M,) array_like
        Vessel diameter D, µm, > 1.1.
    haematocrit : float or (M,) array_like
        Discharge haematocrit H_D, 0 <= H_D < 1.

    Returns
    -------
    (M,) float ndarray
        Apparent viscosity over plasma viscosity.
    """
    d = np.asarray(diameter_um, dtype=float)
    eta45 = 6.0 * np.exp(-0.085 * d) + 3.2 - 2.44 * np.exp(-0.06 * d**0.645)
    wall = (d / (d - 1.1)) ** 2
    return (1.0 + (eta45 - 1.0) * _haematocrit_factor(haematocrit, _c_exponent(d)) * wall) * wall


def segment_viscosity_mpa_s(
    diameter_um: np.ndarray,
    *,
    model: str,
    viscosity_mpa_s: float,
    haematocrit: float,
    plasma_viscosity_mpa_s: float,
    min_valid_diameter_um: float,
) -> tuple[np.ndarray, list[str]]:
    """Apparent blood viscosity of every segment.

    Parameters
    ----------
    diameter_um : (S,) float ndarray
        Diameters the law is evaluated at, µm.
    model : {'constant', 'pries1992', 'pries1994'}, keyword-only
    viscosity_mpa_s : float, keyword-only
        Viscosity of the constant model, mPa·s.
    haematocrit : float, keyword-only
        Discharge haematocrit for the Pries laws.
    plasma_viscosity_mpa_s : float, keyword-only
        Suspending-medium viscosity the Pries laws scale, mPa·s.
    min_valid_diameter_um : float, keyword-only
        Narrower diameters are evaluated at this value.

    Returns
    -------
    viscosity : (S,) float ndarray
        mPa·s.
    warnings : list of str
        One line if any diameter was clamped.
    """
    d = np.asarray(diameter_um, dtype=float)
    if model == "constant":
        return np.full(d.shape, float(viscosity_mpa_s)), []
    if model not in ("pries1992", "pries1994"):
        raise InputError(f"flow.viscosity_model: expected constant, pries1992 or pries1994, got {model!r}")
    notes: list[str] = []
    low = d < min_valid_diameter_um
    if low.any():
        notes.append(
            f"viscosity: {int(low.sum())} segment(s) narrower than {min_valid_diameter_um:g} µm, "
            f"outside the valid range of the {model} law; evaluated at {min_valid_diameter_um:g} µm"
        )
        d = np.maximum(d, min_valid_diameter_um)
    law = relative_viscosity_vitro if model == "pries1992" else relative_viscosity_vivo
    return plasma_viscosity_mpa_s * law(d, haematocrit), notes


def vivo_viscosity_mpa_s(diameter_um, haematocrit, *, plasma_viscosity_mpa_s: float,
                         min_valid_diameter_um: float) -> np.ndarray:
    """In-vivo apparent viscosity (Pries et al. 1994) at per-segment haematocrits.

    Parameters
    ----------
    diameter_um : (S,) float array_like
        µm; narrower than ``min_valid_diameter_um`` is evaluated there.
    haematocrit : (S,) float array_like
        Discharge haematocrit, in [0, 1).
    plasma_viscosity_mpa_s, min_valid_diameter_um : float, keyword-only

    Returns
    -------
    (S,) float ndarray
        mPa·s.
    """
    d = np.maximum(np.asarray(diameter_um, dtype=float), min_valid_diameter_um)
    return plasma_viscosity_mpa_s * relative_viscosity_vivo(d, np.asarray(haematocrit, dtype=float))

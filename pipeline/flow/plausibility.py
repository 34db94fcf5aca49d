"""Flow statistics by diameter class, checked against published physiological ranges.

In: the segments table with flows solved. Out: speed and wall shear stress statistics per diameter


class (:func:`class_statistics`) and the warnings of a sample outside :data:`PLAUSIBLE`
(:func:`plausibility_warnings`).
"""

from __future__ import annotations


from collections.abc import Mapping
from typing import Any

import numpy as np



#: Diameter classes of the summary, in order.
DIAMETER_CLASSES = ("capillary", "small", "large")

#: Published physiological ranges the summary is checked against (model
#: estimates outside them get a warning). Each entry: summary key, low, high,
#: what and source.
PLAUSIBLE = (
    ("velocity_median_mm_s_capillary", 0.1, 5.0,
     "median capillary speed (mm/s)",
     "red cells in mouse cortical capillaries move at about 0.5-2 mm/s (two-photon line scans, e.g. "
     "Kleinfeld et al. 1998, PNAS 95:15741; from memory); mean blood speed is lower than red-cell speed"),
    ("wss_p99_pa", 0.0, 30.0,
     "99th percentile wall shear stress (Pa)",
     "arteriolar wall shear stress of about 1-5 Pa (Reneman & Hoeks 2008, Med Biol Eng Comput 46:499); "
     "capillaries with the in-vivo viscosity law several times more"),
    ("velocity_max_mm_s", 0.0, 100.0,
     "speed of the fastest segment (mm/s)",
     "mean speeds in microvessels stay below some tens of mm/s (arterioles of 20-60 µm: about 5-50 "
     "mm/s; from memory of intravital studies)"),
)


def class_statistics(diameter_um, velocity_mm_s, wss_pa, perfused, length_um, *,
                     capillary_max_um: float = 8.0, small_max_um: float = 30.0) -> dict[str, Any]:
    """Speed and wall shear stress statistics of perfused segments by diameter class.

    Parameters
    ----------
    diameter_um, velocity_mm_s, wss_pa, length_um : (S,) float ndarray
    perfused : (S,) bool ndarray
    capillary_max_um, small_max_um : float, keyword-only
        Class bounds: capillary below ``capillary_max_um``, small up to
        ``small_max_um``, large above.

    Returns
    -------
    dict
        ``n_perfused_{class}``, ``perfused_length_um_{class}``,
        ``velocity_median_mm_s_{class}``, ``velocity_p95_mm_s_{class}``,
        ``wss_median_pa_{class}``, ``wss_p99_pa_{class}`` (None where the
        class has no perfused segment), and over all perfused segments
        ``velocity_median_mm_s``, ``velocity_max_mm_s``, ``wss_median_pa``,
        ``wss_p99_pa``.
    """
    d = np.asarray(diameter_um, dtype=float)
    cls = np.where(d < capillary_max_um, 0, np.where(d <= small_max_um, 1, 2))
    out: dict[str, Any] = {}

    def pct(x, q):
        return float(np.percentile(x, q)) if x.size else None

    for k, name in enumerate(DIAMETER_CLASSES):
        sel = perfused & (cls == k)
        out[f"n_perfused_{name}"] = int(sel.sum())
        out[f"perfused_length_um_{name}"] = float(length_um[sel].sum())
        out[f"velocity_median_mm_s_{name}"] = pct(velocity_mm_s[sel], 50)
        out[f"velocity_p95_mm_s_{name}"] = pct(velocity_mm_s[sel], 95)
        out[f"wss_median_pa_{name}"] = pct(wss_pa[sel], 50)
        out[f"wss_p99_pa_{name}"] = pct(wss_pa[sel], 99)
    out["velocity_median_mm_s"] = pct(velocity_mm_s[perfused], 50)
    out["velocity_max_mm_s"] = float(velocity_mm_s[perfused].max()) if perfused.any() else None
    out["wss_median_pa"] = pct(wss_pa[perfused], 50)
    out["wss_p99_pa"] = pct(wss_pa[perfused], 99)
    return out


def plausibility_warnings(summary: Mapping[str, Any]) -> list[str]:
    """Warnings for flow summaries outside published physiological ranges.

    Parameters
    ----------
    summary : mapping
        Needs the keys of :data:`PLAUSIBLE` and ``perfused_length_fraction``
        (None values are skipped).

    Returns
    -------
    list of str
    """
    notes = []
    frac = summary.get("perfused_length_fraction")
    if frac is not None and frac < 0.5:
        notes.append(
            f"flow: only {100 * frac:.0f} % of the vessel length is perfused; the flow statistics describe "
            "less than half of the network"
        )
    for key, lo, hi, what, source in PLAUSIBLE:
        val = summary.get(key)
        if val is not None and not lo <= val <= hi:
            notes.append(f"flow: {what} is {val:.3g}, outside the plausible {lo:g}-{hi:g}; {source}")
    return notes

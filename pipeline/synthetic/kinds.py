"""The named kinds of synthetic volume, as the ``synth`` command offers them.

In: a kind name and its parameters. Out: the mask and truth of :func:`synthesize`;
:data:`SYNTH_KINDS` maps each name to its builder and defaults.
"""

from __future__ import annotations

import inspect
from dataclasses import dataclass
from typing import Any, Callable, Mapping

import numpy as np

from ._common import _bad, _jsonable
from .network import VesselNetwork
from .shapes import curved_tube, helix, ladder, straight_tube, torus
from .trees import binary_tree, y_branch
from .beds import capillary_bed
from .cortex import MMHG_PA, cortex_network, network_flow_truth
from .raster import rasterize


def _cortex_kind(**params: Any) -> VesselNetwork:
    """:func:`cortex_network` with the truth flows of the whole network on its segments.

    Takes the builder's keywords and ``arteriole_pressure_pa``,
    ``venule_pressure_pa`` and ``viscosity_model`` for
    :func:`network_flow_truth` (other flow options at the project's
    defaults); each segment gains ``flow_truth_nl_min`` (positive from
    ``node_from`` to ``node_to``), which the rasteriser's clipping copies
    onto the pieces inside the volume (pieces keep their source's
    orientation), and ``params['flow_truth']`` records the flow options
    used (``config``) and the total inflow.
    """
    from ..config import validate_config

    flow_keys = ("arteriole_pressure_pa", "venule_pressure_pa", "viscosity_model")
    flow = {k: params.pop(k) for k in flow_keys if k in params}
    net = cortex_network(**params)
    p_art = flow.get("arteriole_pressure_pa", 55.0 * MMHG_PA)
    p_ven = flow.get("venule_pressure_pa", 18.0 * MMHG_PA)
    model = flow.get("viscosity_model", "pries1994")
    res = network_flow_truth(
        net, arteriole_pressure_pa=p_art, venule_pressure_pa=p_ven, viscosity_model=model
    )
    q = dict(zip(res.segments["segment_id"].tolist(), res.segments["flow_nl_min"].tolist()))
    for s in net.segments:
        s["flow_truth_nl_min"] = q[s["id"]]
    used = validate_config({"flow": {"viscosity_model": model}})["flow"]
    used.update(boundary="pressure", inlet_pressure_pa=float(p_art), outlet_pressure_pa=float(p_ven),
                blind_ends="sealed", inlet_flow_nl_min=None)
    net.params["flow_truth"] = {
        "arteriole_pressure_pa": float(p_art),
        "venule_pressure_pa": float(p_ven),
        "viscosity_model": model,
        "config": used,
        "total_inflow_nl_min": res.summary["total_inflow_nl_min"],
        "note": "flows of the whole network before clipping; pieces keep their source's orientation",
    }
    return net


# synthesize() routes keywords by the builder's signature: the builder's own plus the flow ones.
_cortex_kind.__signature__ = inspect.Signature(  # type: ignore[attr-defined]
    list(inspect.signature(cortex_network).parameters.values())
    + [
        inspect.Parameter("arteriole_pressure_pa", inspect.Parameter.KEYWORD_ONLY, default=55.0 * MMHG_PA),
        inspect.Parameter("venule_pressure_pa", inspect.Parameter.KEYWORD_ONLY, default=18.0 * MMHG_PA),
        inspect.Parameter("viscosity_model", inspect.Parameter.KEYWORD_ONLY, default="pries1994"),
    ]
)


# ---------------------------------------------------------------------- dispatching


@dataclass(frozen=True)
class SynthKind:
    """A named synthetic volume: its builder, small defaults and a one-line summary."""

    builder: Callable[..., VesselNetwork]
    defaults: Mapping[str, Any]
    summary: str


SYNTH_KINDS: dict[str, SynthKind] = {
    "tube": SynthKind(straight_tube, {"length_um": 60.0, "radius_um": 5.0}, "straight tube cut by two faces"),
    "curved": SynthKind(
        curved_tube, {"arc_radius_um": 40.0, "angle_deg": 90.0, "radius_um": 5.0}, "quarter-circle tube"
    ),
    "helix": SynthKind(
        helix, {"coil_radius_um": 15.0, "pitch_um": 20.0, "turns": 2.0, "radius_um": 4.0}, "helical tube"
    ),
    "torus": SynthKind(torus, {"major_radius_um": 30.0, "minor_radius_um": 6.0}, "closed ring, one loop"),
    "ybranch": SynthKind(
        y_branch,
        {"parent_radius_um": 8.0, "parent_length_um": 60.0, "daughter_length_um": 50.0},
        "one Murray bifurcation",
    ),
    "tree": SynthKind(
        binary_tree,
        {"depth": 4, "root_radius_um": 8.0, "length_radius_ratio": 10.0, "min_radius_um": 2.0, "seed": 0},
        "3-D dichotomous cube-law tree",
    ),
    "bed": SynthKind(capillary_bed, {"shape_um": (96.0, 96.0, 96.0), "seed": 0}, "looping capillary lattice"),
    "ladder": SynthKind(ladder, {}, "two rails joined by rungs (loops)"),
    "cortex": SynthKind(
        _cortex_kind,
        {"shape_um": (300.0, 300.0, 300.0), "n_arterioles": 2, "n_venules": 3, "seed": 0},
        "arteriolar and venular trees feeding a capillary mesh, with truth flows",
    ),
}

_RASTER_KEYS = (
    "spacing",
    "shape",
    "margin_um",
    "roughness",
    "roughness_correlation_um",
    "specks",
    "holes",
    "hole_radius_vox",
    "open_holes",
    "blobs",
    "handles",
    "gaps",
    "psf_sigma_um",
    "psf_threshold",
    "jitter_vox",
    "fit_artefacts",
    "seed",
)


def build_network(kind: str, **params: Any) -> tuple[VesselNetwork, dict[str, Any]]:
    """The network of a named kind and the :func:`rasterize` keywords among ``params`` (see :func:`synthesize`)."""
    if kind not in SYNTH_KINDS:
        raise _bad("kind", "one of " + ", ".join(SYNTH_KINDS), kind)
    spec = SYNTH_KINDS[kind]
    accepted = set(inspect.signature(spec.builder).parameters)
    merged = {**spec.defaults, **params}
    unknown = sorted(k for k in merged if k not in accepted and k not in _RASTER_KEYS)
    if unknown:
        raise _bad(
            unknown[0],
            f"a parameter of '{kind}' (one of {', '.join(sorted(accepted | set(_RASTER_KEYS)))})",
            merged[unknown[0]],
        )
    net = spec.builder(**{k: v for k, v in merged.items() if k in accepted})
    return net, {k: v for k, v in merged.items() if k in _RASTER_KEYS}


def synthesize(kind: str, **params: Any) -> tuple[np.ndarray, dict[str, Any]]:
    """Build and rasterise a named synthetic volume.

    Parameters
    ----------
    kind : str
        A key of :data:`SYNTH_KINDS`.
    **params
        Builder keywords and :func:`rasterize` keywords (``spacing``, ``shape``,
        ``margin_um``, ``roughness``, ``specks``, ``holes``, ``seed`` and the
        artefact options ``roughness_correlation_um``, ``hole_radius_vox``,
        ``open_holes``, ``blobs``, ``handles``, ``gaps``, ``psf_sigma_um``,
        ``psf_threshold``, ``jitter_vox``, ``fit_artefacts``); they override the kind's
        defaults. ``seed`` goes to both.

    Returns
    -------
    mask : ndarray of bool, shape (Z, Y, X)
    truth : dict
        As from :func:`rasterize`, plus ``synth_kind`` and ``synth_params``.
    """
    net, raster = build_network(kind, **params)
    mask, truth = rasterize(net, **raster)
    truth["synth_kind"] = kind
    truth["synth_params"] = _jsonable({**SYNTH_KINDS[kind].defaults, **params})
    return mask, truth

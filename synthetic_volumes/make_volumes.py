"""Regenerate the demo volumes of the fictional "TW" tumour-window study.

In: nothing (all parameters and seeds are fixed below). Out: for each volume a
zlib-compressed uint8 0/255 ImageJ TIFF and its ``<stem>.truth.json`` in this
folder. Run from the repository root::

    python synthetic_volumes/make_volumes.py

Same seeds give the same masks and truth files.
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
from scipy import ndimage
from skimage.measure import euler_number

HERE = Path(__file__).resolve().parent
try:
    from pipeline import synthetic
except ImportError:  # running from a checkout without an installed package
    sys.path.insert(0, str(HERE.parent))
    from pipeline import synthetic

# Same two-photon-like grid for both animals: z steps twice the lateral pixel.
TREE_SPACING = (2.0, 1.0, 1.0)

VOLUMES = {
    # Control animal: cube-law tree (Murray exponent 3), nearly smooth walls, a few specks.
    "tw-ctrl-01": dict(
        builder=synthetic.binary_tree,
        build=dict(
            depth=4,
            root_radius_um=7.5,
            exponent=3.0,
            length_radius_ratio=7.0,
            min_radius_um=2.2,
            jitter_deg=6.0,
            seed=14,
        ),
        raster=dict(spacing=TREE_SPACING, roughness=0.05, specks=12, seed=115),
    ),
    # Treated animal: flatter radius law (exponent 2.3), a third of the
    # bifurcations broken on purpose, tortuous and rough vessels, more specks
    # and a few enclosed holes in the widest vessels.
    "tw-trt-01": dict(
        builder=synthetic.binary_tree,
        build=dict(
            depth=4,
            root_radius_um=7.5,
            exponent=2.3,
            length_radius_ratio=7.0,
            min_radius_um=2.0,
            jitter_deg=8.0,
            wiggle=0.12,
            broken_fraction=0.3,
            seed=29,
        ),
        raster=dict(spacing=TREE_SPACING, roughness=0.15, specks=25, holes=3, seed=130),
    ),
    # Capillary bed of the control animal at isotropic 1 um sampling.
    "tw-bed-01": dict(
        builder=synthetic.capillary_bed,
        build=dict(shape_um=(128.0, 128.0, 128.0), vessel_fraction=0.15, radius_range_um=(2.0, 4.0), seed=31),
        raster=dict(spacing=(1.0, 1.0, 1.0), roughness=0.05, specks=8, seed=131),
    ),
}


# Further animals of the study, four per group, so the group comparison can
# reach significance (an exact two-sided Mann-Whitney test of 5 against 5
# animals gives p >= 2/252 = 0.008, of 1 against 1 never below 1). They go to
# study/, which `vesselflow demo` (synthetic_volumes/*.tif) does not read.
# Controls: cube-law trees like tw-ctrl-01. Treated: exponent 2.3 like
# tw-trt-01, tortuous and rough, but with one bifurcation in ten broken rather
# than one in three, and longer segments: in tw-trt-01 the broken junctions
# (wide daughters, long enough to measure) are half of the junctions whose
# radii can be measured at all, so no fit can tell its law from the breakage.
STUDY = {}
for _k, _seed in enumerate((41, 42, 43, 44, 45, 46), start=2):
    STUDY[f"tw-ctrl-{_k:02d}"] = dict(
        builder=synthetic.binary_tree,
        build=dict(depth=4, root_radius_um=7.5, exponent=3.0, length_radius_ratio=9.0, min_radius_um=2.2,
                   jitter_deg=6.0, seed=_seed),
        raster=dict(spacing=TREE_SPACING, roughness=0.05, specks=12, seed=100 + _seed),
    )
for _k, _seed in enumerate((51, 52, 53, 54, 55, 56), start=2):
    STUDY[f"tw-trt-{_k:02d}"] = dict(
        builder=synthetic.binary_tree,
        build=dict(depth=4, root_radius_um=7.5, exponent=2.3, length_radius_ratio=9.0, min_radius_um=2.0,
                   jitter_deg=8.0, wiggle=0.12, broken_fraction=0.1, seed=_seed),
        raster=dict(spacing=TREE_SPACING, roughness=0.15, specks=25, holes=3, seed=100 + _seed),
    )


def main() -> None:
    (HERE / "study").mkdir(exist_ok=True)
    for stem, spec in [*VOLUMES.items(), *STUDY.items()]:
        net = spec["builder"](**spec["build"])
        mask, truth = synthetic.rasterize(net, **spec["raster"])
        # Measured on the mask itself, so tests can tell digitisation effects
        # (an occasional one-voxel handle) from extraction errors.
        _, n_parts = ndimage.label(mask, structure=np.ones((3, 3, 3), dtype=bool))
        truth["mask_topology"] = {
            "components_26": int(n_parts),
            "euler_number_26": int(euler_number(mask, connectivity=3)),
        }
        truth["study"] = {
            "name": "TW tumour-window study (fictional)",
            "volume": stem,
            "animal": "control" if "ctrl" in stem or "bed" in stem else "treated",
            "generated_by": "synthetic_volumes/make_volumes.py",
        }
        folder = HERE / "study" if stem in STUDY else HERE
        path = synthetic.write_volume(
            folder / f"{stem}.tif", mask, spacing=spec["raster"]["spacing"], truth=truth
        )
        s = truth["summary"]
        print(
            f"{path.name}: shape {tuple(mask.shape)}, spacing {spec['raster']['spacing']}, "
            f"vessel fraction {mask.mean():.3f}, {s['n_segments']} segments, "
            f"{s['n_bifurcations']} bifurcations ({s['n_broken_bifurcations']} broken), "
            f"{s['cyclomatic_number']} loops, {len(truth['specks'])} specks, {len(truth['holes'])} holes, "
            f"mask components {truth['mask_topology']['components_26']}, "
            f"Euler number {truth['mask_topology']['euler_number_26']}"
        )


if __name__ == "__main__":
    main()

"""Reading binary vessel masks from disk or from arrays.

In: a path to a TIFF / BigTIFF / OME-TIFF (``.tif``, ``.tiff``, ``.ome.tif``,
``.ome.tiff``; uncompressed or LZW/zlib/zstd compressed), NIfTI-1/2 (``.nii``,
``.nii.gz``), NumPy (``.npy``, ``.npz``) or HDF5 (``.h5``, ``.hdf5``) file, a
Zarr or OME-Zarr store (``.zarr``), or an in-memory array; an
optional voxel spacing and an optional threshold. Out: a :class:`MaskImage`
holding a C-contiguous boolean ``(Z, Y, X)`` mask, the voxel spacing in µm as
``(dz, dy, dx)``, where that spacing came from, and provenance (file hash,
stored dtype, axes found, warning strings for the run record).

Every problem with the input is reported as one :class:`~pipeline.errors.InputError`
line naming the file or parameter, what was expected and what was found. The
module never emits Python warnings: anything worth telling the user is returned
in ``MaskImage.warnings``.

Conventions
-----------
* Axis order is ``(z, y, x)``; voxel ``(i, j, k)`` has its centre at
  ``(i*dz, j*dy, k*dx)`` µm. NIfTI stores ``(x, y, z)`` and is transposed on
  reading; its orientation (affine) is otherwise ignored because vessel
  measurements do not depend on axis flips.
* A mask with a single z plane (a 2-D file, or a 3-D one with one slice) is
  returned with shape ``(1, Y, X)`` and ``planar=True``. Its z spacing is set to
  ``min(dy, dx)``; the analysis of planar masks is in-plane and never uses it.
* A voxel is vessel when it is non-zero, provided the image has at most two
  distinct values one of which is 0. Anything else needs an explicit threshold
  (vessel = value > threshold).
* Spacing is checked for plausibility before any pixel data are loaded: a
  value outside :data:`PLAUSIBLE_SPACING_UM` (a unit mix-up: nanometres or
  millimetres taken as µm) or in-plane axes far apart with z finer than one
  of them (values given in X Y Z order) gives one warning, or an error when
  asked for (``implausible_spacing='error'``). A NIfTI header without a
  spatial unit is read in the one unit (µm or mm) that makes its ``pixdim``
  plausible, and refused when both or neither do.
* The memory check counts the isotropic grid that the centrelines step thins
  on when it resamples (see :func:`thinning_grid_shape`), so a spacing that
  would make that grid astronomical fails here, before any allocation.

Layout (each module's docstring says what comes in and what goes out):
``_common`` (the :class:`MaskImage` type, argument checks, axis layouts,
library messages) -> ``spacing`` (units, plausibility) -> ``memory``
(estimates, the machine's and the cgroup's memory) and ``values`` (scans,
binarising) -> ``opened`` (a file opened, pixels not yet loaded) -> one
module per format: ``tiff``, ``nifti``, ``numpy_files``, ``chunked`` (Zarr,
OME-Zarr, HDF5) -> ``reader`` (:func:`read_mask`, :func:`open_mask` for
reading part by part, :func:`mask_from_array`).
"""

from ._common import DEFAULT_SPACING_WARNING, MaskImage, SUPPORTED_EXTENSIONS
from .spacing import PLAUSIBLE_SPACING_UM, spacing_problem
from .memory import available_memory_bytes, check_memory, estimate_memory_bytes, thinning_grid_shape
from .reader import LazyMask, mask_from_array, open_mask, read_mask, sha256_file
from .values import binarise

__all__ = [
    "MaskImage",
    "read_mask",
    "open_mask",
    "LazyMask",
    "mask_from_array",
    "estimate_memory_bytes",
    "available_memory_bytes",
    "check_memory",
    "thinning_grid_shape",
    "spacing_problem",
    "PLAUSIBLE_SPACING_UM",
    "SUPPORTED_EXTENSIONS",
    "DEFAULT_SPACING_WARNING",
    "sha256_file",
    "binarise",
]

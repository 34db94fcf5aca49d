"""Tests for pipeline.reading: formats, spacing, axes, values, corruption, memory."""

from __future__ import annotations

import hashlib
from pathlib import Path

import nibabel as nib
import numpy as np
import pytest
import tifffile

from pipeline import centrelines, reading, synthetic
from pipeline.reading import memory as reading_memory
from pipeline.analysis import analyze, analyze_file
from pipeline.cli import main
from pipeline.errors import InputError
from pipeline.reading import (
    DEFAULT_SPACING_WARNING,
    MaskImage,
    available_memory_bytes,
    estimate_memory_bytes,
    mask_from_array,
    read_mask,
)

# (dz, dy, dx) in µm; all different so that an axis mix-up shows.
SPACING = (2.0, 0.5, 0.25)

ROOT = Path(__file__).resolve().parents[1]


def _volume(shape=(6, 7, 8), seed=0) -> np.ndarray:
    """Asymmetric binary volume (uint8 0/1) with vessel and background."""
    rng = np.random.default_rng(seed)
    vol = (rng.random(shape) > 0.7).astype(np.uint8)
    vol[0, 0, 0] = 1
    vol[-1, -1, -1] = 0
    return vol


def _write(kind: str, tmp_path, data: np.ndarray, spacing=SPACING):
    """Write ``data`` (Z, Y, X) in format ``kind`` with ``spacing``.

    Returns the path and the spacing source the reader should report.
    """
    dz, dy, dx = spacing
    ome_meta = {
        "axes": "ZYX",
        "PhysicalSizeZ": dz,
        "PhysicalSizeY": dy,
        "PhysicalSizeX": dx,
    }
    ij_meta = {"axes": "ZYX", "spacing": dz, "unit": "um"}
    if kind == "imagej":
        path = tmp_path / "m.tif"
        tifffile.imwrite(path, data, imagej=True, resolution=(1 / dx, 1 / dy), metadata=ij_meta)
        return path, "imagej"
    if kind == "imagej-zlib":
        path = tmp_path / "m.tiff"
        tifffile.imwrite(path, data, imagej=True, resolution=(1 / dx, 1 / dy), metadata=ij_meta,
                         compression="zlib")
        return path, "imagej"
    if kind == "ome":
        path = tmp_path / "m.ome.tif"
        tifffile.imwrite(path, data, ome=True, metadata=ome_meta)
        return path, "ome"
    if kind == "ome-lzw":
        path = tmp_path / "m.ome.tiff"
        tifffile.imwrite(path, data, ome=True, metadata=ome_meta, compression="lzw")
        return path, "ome"
    if kind == "bigtiff-ome-zstd":
        path = tmp_path / "m.ome.tif"
        tifffile.imwrite(path, data, ome=True, bigtiff=True, metadata=ome_meta, compression="zstd")
        return path, "ome"
    if kind in ("nii", "nii.gz"):
        path = tmp_path / f"m.{kind}"
        affine = np.diag([dx / 1000, dy / 1000, dz / 1000, 1.0])  # mm
        img = nib.Nifti1Image(np.ascontiguousarray(data.transpose(2, 1, 0)), affine)
        img.header.set_xyzt_units("mm")
        nib.save(img, path)
        return path, "nifti"
    if kind == "npz":
        path = tmp_path / "m.npz"
        np.savez_compressed(path, mask=data, spacing=np.array(spacing))
        return path, "npz"
    raise AssertionError(kind)


ROUND_TRIP_KINDS = ["imagej", "imagej-zlib", "ome", "ome-lzw", "bigtiff-ome-zstd", "nii", "nii.gz", "npz"]


# --------------------------------------------------------------------------- #
# Formats and spacing
# --------------------------------------------------------------------------- #


@pytest.mark.parametrize("kind", ROUND_TRIP_KINDS)
def test_every_format_round_trips_mask_and_spacing(tmp_path, kind):
    data = _volume()
    path, source = _write(kind, tmp_path, data)
    img = read_mask(path)
    assert isinstance(img, MaskImage)
    assert img.mask.dtype == np.bool_ and img.mask.flags.c_contiguous
    np.testing.assert_array_equal(img.mask, data.astype(bool))
    assert img.spacing == pytest.approx(SPACING, rel=1e-6)
    assert img.spacing_source == source
    assert img.planar is False
    assert img.original_dtype == "uint8"
    assert img.path == str(path)
    assert img.sha256 == hashlib.sha256(path.read_bytes()).hexdigest()
    assert DEFAULT_SPACING_WARNING not in img.warnings


def test_bigtiff_header_is_really_bigtiff(tmp_path):
    path, _ = _write("bigtiff-ome-zstd", tmp_path, _volume())
    with tifffile.TiffFile(path) as tf:
        assert tf.is_bigtiff
    assert read_mask(path).mask.sum() == _volume().sum()


def test_npy_with_spacing_argument(tmp_path):
    data = _volume()
    path = tmp_path / "m.npy"
    np.save(path, data)
    img = read_mask(path, spacing=[2, 0.5, 0.25])
    np.testing.assert_array_equal(img.mask, data.astype(bool))
    assert img.spacing == SPACING
    assert img.spacing_source == "argument"
    assert img.warnings == ()
    assert img.axes_found == "ZYX"


@pytest.mark.parametrize("suffix", ["nii", "nii.gz"])
def test_nifti_axes_are_converted_from_xyz_to_zyx(tmp_path, suffix):
    xyz = np.zeros((4, 5, 6), dtype=np.uint8)  # x, y, z sizes all different
    xyz[1, 2, 3] = 1
    img = nib.Nifti1Image(xyz, np.diag([0.5, 0.6, 2.0, 1.0]))
    img.header.set_xyzt_units("mm")
    path = tmp_path / f"a.{suffix}"
    nib.save(img, path)
    out = read_mask(path)
    assert out.mask.shape == (6, 5, 4)
    assert out.mask[3, 2, 1]
    assert np.count_nonzero(out.mask) == 1
    assert out.spacing == pytest.approx((2000.0, 600.0, 500.0))
    assert out.axes_found == "XYZ"


@pytest.mark.parametrize(
    ("unit", "factor", "warned"),
    # No unit: 0.25-2 is a plausible voxel size in µm only (250-2000 µm is not
    # a microscope voxel), so it is read as µm, with a note.
    [("mm", 1000.0, False), ("micron", 1.0, False), ("meter", 1e6, False), ("unknown", 1.0, True)],
)
def test_nifti_units_converted_to_micrometres(tmp_path, unit, factor, warned):
    data = _volume()
    img = nib.Nifti1Image(np.ascontiguousarray(data.T), np.diag([0.25, 0.5, 2.0, 1.0]))
    img.header.set_xyzt_units(unit if unit != "unknown" else 0)
    path = tmp_path / "u.nii"
    nib.save(img, path)
    out = read_mask(path)
    assert out.spacing == pytest.approx((2.0 * factor, 0.5 * factor, 0.25 * factor))
    assert any("gives no spatial unit" in w for w in out.warnings) is warned


@pytest.mark.parametrize(
    ("unit", "factor"), [("µm", 1.0), ("nm", 1e-3), ("mm", 1e3), ("m", 1e6)]
)
def test_ome_physical_size_units(tmp_path, unit, factor):
    path = tmp_path / "u.ome.tif"
    meta = {"axes": "ZYX", "PhysicalSizeZ": 3, "PhysicalSizeY": 2, "PhysicalSizeX": 1,
            "PhysicalSizeZUnit": unit, "PhysicalSizeYUnit": unit, "PhysicalSizeXUnit": unit}
    tifffile.imwrite(path, _volume(), ome=True, metadata=meta)
    out = read_mask(path)
    assert out.spacing == pytest.approx((3 * factor, 2 * factor, 1 * factor))
    assert out.spacing_source == "ome"


@pytest.mark.parametrize(
    ("unit", "factor"),
    [("micron", 1.0), ("um", 1.0), ("\\u00B5m", 1.0), ("microns", 1.0), ("nm", 1e-3), ("mm", 1e3)],
)
def test_imagej_units(tmp_path, unit, factor):
    path = tmp_path / "u.tif"
    tifffile.imwrite(path, _volume(), imagej=True, resolution=(4.0, 2.0),
                     metadata={"axes": "ZYX", "spacing": 3.0, "unit": unit})
    out = read_mask(path)
    # resolution is pixels per unit: x 4/unit -> 0.25 unit, y 2/unit -> 0.5 unit
    assert out.spacing == pytest.approx((3.0 * factor, 0.5 * factor, 0.25 * factor))
    assert out.spacing_source == "imagej"


def test_tiff_resolution_in_centimetres(tmp_path):
    path = tmp_path / "r.tif"
    tifffile.imwrite(path, _volume()[0], resolution=(1e4 / 0.25, 1e4 / 0.5), resolutionunit="CENTIMETER")
    out = read_mask(path)
    assert out.spacing_source == "tiff-resolution"
    assert out.spacing == pytest.approx((0.25, 0.5, 0.25))


def test_dots_per_inch_is_not_taken_as_voxel_size(tmp_path):
    path = tmp_path / "dpi.tif"
    tifffile.imwrite(path, _volume(), resolution=(72, 72))
    out = read_mask(path)
    assert out.spacing == (1.0, 1.0, 1.0)
    assert out.spacing_source == "default"
    assert any("dots per inch" in w for w in out.warnings)


def test_default_spacing_gives_warning(tmp_path):
    path = tmp_path / "plain.tif"
    tifffile.imwrite(path, _volume())
    out = read_mask(path)
    assert out.spacing == (1.0, 1.0, 1.0)
    assert out.spacing_source == "default"
    assert DEFAULT_SPACING_WARNING in out.warnings
    assert DEFAULT_SPACING_WARNING == "no voxel spacing in the file or arguments; assuming 1 µm on every axis"


def test_spacing_argument_overrides_file_metadata(tmp_path):
    path, _ = _write("imagej", tmp_path, _volume())
    out = read_mask(path, spacing=(1.0, 1.0, 1.0))
    assert out.spacing == (1.0, 1.0, 1.0)
    assert out.spacing_source == "argument"
    assert any("overrides" in w for w in out.warnings)


@pytest.mark.parametrize("bad", [0, -1, float("nan"), float("inf")])
def test_bad_spacing_argument_fails_naming_axis_and_value(tmp_path, bad):
    path = tmp_path / "m.npy"
    np.save(path, _volume())
    with pytest.raises(InputError, match=r"spacing: dy must be a positive finite number") as info:
        read_mask(path, spacing=(1.0, bad, 1.0))
    assert str(float(bad)) in str(info.value)
    with pytest.raises(InputError, match="dy"):
        mask_from_array(_volume(), spacing=(1.0, bad, 1.0))


@pytest.mark.parametrize("bad", [0.0, -1.0, float("nan")])
def test_bad_spacing_in_file_fails_naming_axis(tmp_path, bad):
    path = tmp_path / "m.npz"
    np.savez(path, mask=_volume(), spacing=np.array([bad, 1.0, 1.0]))
    with pytest.raises(InputError, match=r"dz .*'spacing' array.*got"):
        read_mask(path)
    # an explicit spacing makes the file's value irrelevant
    assert read_mask(path, spacing=(1, 1, 1)).spacing_source == "argument"


@pytest.mark.parametrize("spacing", [(1.0, 1.0), (1.0,), (1, 2, 3, 4), "1,1,1", 0.5])
def test_wrong_number_of_spacing_values_fails(spacing):
    with pytest.raises(InputError, match="spacing"):
        mask_from_array(_volume(), spacing=spacing)


# --------------------------------------------------------------------------- #
# 2-D input
# --------------------------------------------------------------------------- #


@pytest.mark.parametrize("kind", ["tif", "npy", "nii", "array"])
def test_2d_mask_is_planar_with_shape_1_y_x(tmp_path, kind):
    plane = _volume()[2]
    if kind == "tif":
        path = tmp_path / "p.tif"
        tifffile.imwrite(path, plane * 255)
        out = read_mask(path, spacing=(0.5, 0.25))
    elif kind == "npy":
        path = tmp_path / "p.npy"
        np.save(path, plane.astype(bool))
        out = read_mask(path, spacing=(0.5, 0.25))
    elif kind == "nii":
        path = tmp_path / "p.nii"
        img = nib.Nifti1Image(np.ascontiguousarray(plane.T), np.diag([0.00025, 0.0005, 1.0, 1.0]))
        img.header.set_xyzt_units("mm")
        nib.save(img, path)
        out = read_mask(path)
    else:
        out = mask_from_array(plane, spacing=(0.5, 0.25))
    assert out.planar is True
    assert out.mask.shape == (1,) + plane.shape
    np.testing.assert_array_equal(out.mask[0], plane.astype(bool))
    # z spacing of a plane is set to the finest in-plane spacing
    assert out.spacing == pytest.approx((0.25, 0.5, 0.25))


def test_two_spacing_values_rejected_for_3d(tmp_path):
    with pytest.raises(InputError, match="3-D, expected 3 values"):
        mask_from_array(_volume(), spacing=(0.5, 0.5))


# --------------------------------------------------------------------------- #
# Axes
# --------------------------------------------------------------------------- #


def test_singleton_axes_are_squeezed_imagej_tzcyx(tmp_path):
    data = _volume()
    path = tmp_path / "h.tif"
    tifffile.imwrite(path, data[np.newaxis, :, np.newaxis], imagej=True, metadata={"axes": "TZCYX"})
    out = read_mask(path)
    assert out.mask.shape == data.shape
    np.testing.assert_array_equal(out.mask, data.astype(bool))
    assert set("TZCYX") <= set(out.axes_found)


def test_singleton_axes_are_squeezed_npy_and_nifti(tmp_path):
    data = _volume()
    npy = tmp_path / "s.npy"
    np.save(npy, data[np.newaxis, ..., np.newaxis])
    out = read_mask(npy)
    assert out.mask.shape == data.shape
    assert out.axes_found == "QZYXQ"
    nii = tmp_path / "s.nii.gz"
    nib.save(nib.Nifti1Image(np.ascontiguousarray(data.T)[..., np.newaxis], np.eye(4)), nii)
    out = read_mask(nii)
    np.testing.assert_array_equal(out.mask, data.astype(bool))


@pytest.mark.parametrize(
    ("shape", "axes", "expected"),
    [
        ((3, 6, 7, 8), "TZYX", "4 axes (T=3, Z=6, Y=7, X=8)"),
        ((3, 6, 2, 7, 8), "TZCYX", "5 axes (T=3, Z=6, C=2, Y=7, X=8)"),
        ((3, 1, 2, 7, 8), "TZCYX", "4 axes (T=3, C=2, Y=7, X=8)"),
    ],
)
def test_real_extra_tiff_axes_fail_naming_them(tmp_path, shape, axes, expected):
    path = tmp_path / "x.tif"
    tifffile.imwrite(path, np.zeros(shape, np.uint8), imagej=True, metadata={"axes": axes})
    with pytest.raises(InputError) as info:
        read_mask(path)
    message = str(info.value)
    assert expected in message
    assert "expected a 2-D or 3-D binary mask (Y, X or Z, Y, X)" in message
    assert str(path) in message


def test_time_series_without_z_is_not_taken_as_a_stack(tmp_path):
    path = tmp_path / "t.tif"
    tifffile.imwrite(path, _volume(), imagej=True, metadata={"axes": "TYX"})
    with pytest.raises(InputError, match=r"T=6.*not a z axis"):
        read_mask(path)


def test_rgb_tiff_fails(tmp_path):
    path = tmp_path / "rgb.tif"
    tifffile.imwrite(path, np.zeros((7, 8, 3), np.uint8), photometric="rgb")
    with pytest.raises(InputError, match=r"S=3"):
        read_mask(path)


@pytest.mark.parametrize("shape", [(3, 6, 7, 8), (2, 3, 6, 7, 8)])
def test_real_extra_array_axes_fail_by_position(tmp_path, shape):
    path = tmp_path / "x.npy"
    np.save(path, np.zeros(shape, np.uint8))
    with pytest.raises(InputError, match=rf"{len(shape)} axes \(axis 0={shape[0]}, axis 1={shape[1]}"):
        read_mask(path)
    with pytest.raises(InputError, match=r"mask array has \d axes"):
        mask_from_array(np.zeros(shape, np.uint8))


def test_nifti_time_axis_fails(tmp_path):
    path = tmp_path / "t.nii"
    nib.save(nib.Nifti1Image(np.zeros((8, 7, 6, 3), np.uint8), np.eye(4)), path)
    with pytest.raises(InputError, match=r"4 axes \(x=8, y=7, z=6, t=3\)"):
        read_mask(path)


def test_1d_array_fails():
    with pytest.raises(InputError, match="1 axis"):
        mask_from_array(np.array([0, 1, 0]))


# --------------------------------------------------------------------------- #
# Values
# --------------------------------------------------------------------------- #


@pytest.mark.parametrize(
    ("dtype", "on"),
    [(np.uint8, 1), (np.uint8, 255), (np.uint8, 254), (np.uint16, 65535), (np.int16, -1),
     (np.bool_, True), (np.float32, 1.0), (np.float64, 0.5)],
)
@pytest.mark.parametrize("fmt", ["npy", "tif"])
def test_binary_valued_images_of_any_value_are_masks(tmp_path, dtype, on, fmt):
    data = _volume().astype(bool)
    stored = np.where(data, on, 0).astype(dtype)
    path = tmp_path / f"b.{fmt}"
    if fmt == "npy":
        np.save(path, stored)
    else:
        tifffile.imwrite(path, stored)
    out = read_mask(path)
    np.testing.assert_array_equal(out.mask, data)
    assert out.original_dtype == np.dtype(dtype).name


def test_probability_image_needs_threshold(tmp_path):
    prob = np.random.default_rng(1).random((6, 7, 8)).astype(np.float32)
    path = tmp_path / "p.tif"
    tifffile.imwrite(path, prob)
    with pytest.raises(InputError) as info:
        read_mask(path)
    message = str(info.value)
    assert "336 distinct values" in message
    # the library names its parameter; the command line shows its option (tests/test_cli.py)
    assert "pass threshold=T to binarise" in message and "--" not in message
    assert f"min {str(prob.min())}" in message and f"max {str(prob.max())}" in message
    out = read_mask(path, threshold=0.5)
    np.testing.assert_array_equal(out.mask, prob > 0.5)
    assert out.original_dtype == "float32"


def test_label_image_distinct_count_and_integer_threshold():
    labels = np.zeros((4, 5, 6), np.uint8)
    labels[1, 1:3, 1:3] = 1
    labels[2, 2:4, 2:5] = 2
    with pytest.raises(InputError, match=r"has 3 distinct values \(min 0, max 2\)") as info:
        mask_from_array(labels)
    # a label image is named as such, with the threshold that keeps every label
    assert "label image" in str(info.value) and "threshold=0 takes every non-zero label" in str(info.value)
    out = mask_from_array(labels, threshold=1.5)
    np.testing.assert_array_equal(out.mask, labels > 1.5)
    out = mask_from_array(labels, threshold=0)
    np.testing.assert_array_equal(out.mask, labels > 0)


def test_two_nonzero_values_are_not_binary():
    with pytest.raises(InputError, match="2 distinct values"):
        mask_from_array(np.where(_volume() > 0, 2, 1).astype(np.uint16))


def test_values_between_zero_and_max_are_detected_when_rare():
    data = _volume().astype(np.uint8) * 255
    data[3, 3, 3] = 17  # a single off value; min/max alone would miss it
    with pytest.raises(InputError, match="3 distinct values"):
        mask_from_array(data)


@pytest.mark.parametrize("fill", [0, 1])
@pytest.mark.parametrize("fmt", ["npy", "tif", "array"])
def test_empty_and_all_vessel_masks_fail(tmp_path, fill, fmt):
    data = np.full((5, 6, 7), fill * 255, np.uint8)
    expected = "no vessel voxel" if fill == 0 else "every voxel is vessel; expected a binary mask with background"
    with pytest.raises(InputError, match=expected):
        if fmt == "array":
            mask_from_array(data)
        else:
            path = tmp_path / f"e.{fmt}"
            if fmt == "npy":
                np.save(path, data)
            else:
                tifffile.imwrite(path, data)
            read_mask(path)


def test_threshold_that_selects_nothing_fails():
    prob = np.linspace(0, 1, 120, dtype=np.float32).reshape(4, 5, 6)
    with pytest.raises(InputError, match="no vessel voxel with threshold 2"):
        mask_from_array(prob, threshold=2.0)


def test_nan_values_fail_even_with_threshold(tmp_path):
    data = _volume().astype(np.float32)
    data[1, 1, 1] = np.nan
    path = tmp_path / "n.npy"
    np.save(path, data)
    for threshold in (None, 0.5):
        with pytest.raises(InputError, match="NaN"):
            read_mask(path, threshold=threshold)


@pytest.mark.parametrize("threshold", ["0.5", float("nan"), True])
def test_bad_threshold_fails(threshold):
    with pytest.raises(InputError, match="threshold"):
        mask_from_array(_volume(), threshold=threshold)


def test_complex_values_fail():
    with pytest.raises(InputError, match="complex"):
        mask_from_array(_volume().astype(np.complex64))


# --------------------------------------------------------------------------- #
# Broken files
# --------------------------------------------------------------------------- #


@pytest.mark.parametrize("compression", [None, "zlib", "lzw"])
@pytest.mark.parametrize("metadata", ["shaped", "imagej", "ome"])
def test_truncated_tiff_fails(tmp_path, compression, metadata):
    data = _volume((20, 32, 32))
    path = tmp_path / "cut.tif"
    kwargs = {"imagej": True} if metadata == "imagej" else {"ome": True} if metadata == "ome" else {}
    tifffile.imwrite(path, data * 255, compression=compression, **kwargs)
    raw = path.read_bytes()
    path.write_bytes(raw[: len(raw) // 2])
    expected = r"could not read TIFF '.*cut\.tif': .+; the file may be truncated or corrupt"
    with pytest.raises(InputError, match=expected):
        read_mask(path)


def test_garbage_with_tif_extension_fails(tmp_path):
    path = tmp_path / "garbage.tif"
    path.write_bytes(np.random.default_rng(2).integers(0, 256, 4096, dtype=np.uint8).tobytes())
    with pytest.raises(InputError, match="could not read TIFF .*truncated or corrupt"):
        read_mask(path)


@pytest.mark.parametrize("suffix", ["npy", "npz", "nii", "nii.gz"])
@pytest.mark.parametrize("damage", ["truncate", "garbage"])
def test_corrupt_numpy_and_nifti_files_fail(tmp_path, suffix, damage):
    data = _volume((10, 16, 16))
    path = tmp_path / f"c.{suffix}"
    if suffix == "npy":
        np.save(path, data)
    elif suffix == "npz":
        np.savez_compressed(path, mask=data)
    else:
        nib.save(nib.Nifti1Image(np.ascontiguousarray(data.T), np.eye(4)), path)
    raw = path.read_bytes()
    if damage == "truncate":
        path.write_bytes(raw[: len(raw) // 2])
    else:
        path.write_bytes(bytes(range(256)) * 8)
    kind = {"npy": "NPY", "npz": "NPZ", "nii": "NIfTI", "nii.gz": "NIfTI"}[suffix]
    with pytest.raises(InputError, match=rf"could not read {kind} .*truncated or corrupt"):
        read_mask(path)


def test_unsupported_extension_lists_supported(tmp_path):
    path = tmp_path / "m.png"
    path.write_bytes(b"\x89PNG")
    with pytest.raises(InputError, match=r"unsupported file type '\.png'") as info:
        read_mask(path)
    for ext in (".tif", ".tiff", ".ome.tif", ".nii", ".nii.gz", ".npy", ".npz"):
        assert ext in str(info.value)


def test_missing_file_fails(tmp_path):
    with pytest.raises(InputError, match="does not exist"):
        read_mask(tmp_path / "nope.tif")


def test_directory_fails(tmp_path):
    folder = tmp_path / "dir.tif"
    folder.mkdir()
    with pytest.raises(InputError, match="not a file"):
        read_mask(folder)


def test_npz_key_selection(tmp_path):
    data = _volume()
    single = tmp_path / "single.npz"
    np.savez(single, vessels=data)
    np.testing.assert_array_equal(read_mask(single).mask, data.astype(bool))
    several = tmp_path / "several.npz"
    np.savez(several, a=data, b=data)
    with pytest.raises(InputError, match="expected an array named 'mask' or a single array, found arrays: a, b"):
        read_mask(several)


# --------------------------------------------------------------------------- #
# Memory
# --------------------------------------------------------------------------- #


def _forbid(*_args, **_kwargs):
    raise AssertionError("pixel data were loaded before the memory check")


@pytest.mark.parametrize("kind", ["tif", "npy", "npz", "nii"])
def test_memory_check_fails_before_loading(tmp_path, monkeypatch, kind):
    data = _volume((6, 7, 8))
    path = tmp_path / f"m.{kind}"
    if kind == "tif":
        tifffile.imwrite(path, data)
        monkeypatch.setattr(tifffile.TiffPageSeries, "asarray", _forbid)
    elif kind == "npy":
        np.save(path, data)
        monkeypatch.setattr(np, "load", _forbid)
    elif kind == "npz":
        np.savez(path, mask=data)
        monkeypatch.setattr(np.lib.format, "read_array", _forbid)
    else:
        nib.save(nib.Nifti1Image(np.ascontiguousarray(data.T), np.eye(4)), path)
        monkeypatch.setattr(nib.arrayproxy.ArrayProxy, "__array__", _forbid)
    expected = r"\(6 x 7 x 8 voxels\) needs about 5\.2 KiB to analyse; only 1000 bytes are available"
    with pytest.raises(InputError, match=expected):
        read_mask(path, memory_limit_bytes=1000)


def test_memory_check_uses_header_only(tmp_path):
    # A header announcing 2000^3 voxels and no data at all: only a check that
    # reads nothing but the header can report memory instead of corruption.
    path = tmp_path / "huge.npy"
    with open(path, "wb") as fp:
        np.lib.format.write_array_header_1_0(
            fp, {"descr": "|u1", "fortran_order": False, "shape": (2000, 2000, 2000)}
        )
    with pytest.raises(InputError, match=r"2000 x 2000 x 2000 voxels\) needs about 119\.2 GiB"):
        read_mask(path, memory_limit_bytes=2**30)
    nii = tmp_path / "huge.nii"
    header = nib.Nifti1Header()
    header.set_data_shape((2000, 2000, 2000))
    header.set_data_dtype(np.uint8)
    with open(nii, "wb") as fp:
        header.write_to(fp)
    with pytest.raises(InputError, match="needs about 119.2 GiB"):
        read_mask(nii, memory_limit_bytes=2**30)


def test_bytes_per_voxel_scales_the_estimate(tmp_path):
    path = tmp_path / "m.npy"
    np.save(path, _volume((10, 10, 10)))
    assert read_mask(path, memory_limit_bytes=1000, bytes_per_voxel=1.0).mask.shape == (10, 10, 10)
    with pytest.raises(InputError, match="needs about"):
        read_mask(path, memory_limit_bytes=1000, bytes_per_voxel=1.5)


def test_estimate_memory_bytes():
    assert estimate_memory_bytes((512, 512, 512), 16.0) == 512**3 * 16
    assert estimate_memory_bytes((3, 1, 1), 0.5) == 2
    with pytest.raises(InputError, match="bytes_per_voxel"):
        estimate_memory_bytes((2, 2, 2), 0)


@pytest.mark.parametrize(
    ("memory_max", "v1_limit", "expected_gib"),
    [("max", None, 8), ("2147483648", None, 2), ("max", "1073741824", 1), ("max", "9223372036854771712", 8)],
)
def test_available_memory_uses_meminfo_and_cgroup_limit(tmp_path, monkeypatch, memory_max, v1_limit, expected_gib):
    meminfo = tmp_path / "meminfo"
    meminfo.write_text(f"MemTotal: {16 * 2**20} kB\nMemFree: 1 kB\nMemAvailable: {8 * 2**20} kB\n")
    root = tmp_path / "cgroup"
    (root / "job").mkdir(parents=True)
    (root / "job" / "memory.max").write_text(memory_max + "\n")
    self_cgroup = tmp_path / "self_cgroup"
    lines = ["0::/job"]
    if v1_limit is not None:
        (root / "memory").mkdir()
        (root / "memory" / "memory.limit_in_bytes").write_text(v1_limit)
        lines.insert(0, "5:memory:/")
    self_cgroup.write_text("\n".join(lines) + "\n")
    monkeypatch.setattr(reading_memory, "_PROC_MEMINFO", meminfo)
    monkeypatch.setattr(reading_memory, "_CGROUP_ROOT", root)
    monkeypatch.setattr(reading_memory, "_PROC_SELF_CGROUP", self_cgroup)
    assert available_memory_bytes() == expected_gib * 2**30


def test_available_memory_on_this_machine_is_positive():
    value = available_memory_bytes()
    assert value is None or value > 0


# --------------------------------------------------------------------------- #
# Arrays
# --------------------------------------------------------------------------- #


def test_mask_from_array_provenance_and_independence():
    data = _volume() * 255
    out = mask_from_array(data)
    assert out.path is None
    assert out.sha256 == hashlib.sha256(np.ascontiguousarray(data).tobytes()).hexdigest()
    assert out.spacing_source == "default" and DEFAULT_SPACING_WARNING in out.warnings
    assert out.original_dtype == data.dtype.name
    assert not np.shares_memory(out.mask, data)
    before = data.copy()
    out.mask[...] = False
    np.testing.assert_array_equal(data, before)
    with pytest.raises(AttributeError):
        out.spacing = (1.0, 1.0, 1.0)  # type: ignore[misc]


def test_mask_from_array_bool_input_is_copied():
    data = _volume().astype(bool)
    out = mask_from_array(data, spacing=SPACING)
    assert out.spacing_source == "argument" and out.warnings == ()
    np.testing.assert_array_equal(out.mask, data)
    assert not np.shares_memory(out.mask, data)


def test_thresholds_outside_the_stored_range():
    data = _volume().astype(np.uint8) * 200
    data[0, 1, 1] = 100
    with pytest.raises(InputError, match="no vessel voxel with threshold 1e"):
        mask_from_array(data, threshold=1e9)
    with pytest.raises(InputError, match="every voxel is vessel with threshold -1e"):
        mask_from_array(data, threshold=-1e9)
    out = mask_from_array(data.astype(np.float16), threshold=150.0)
    np.testing.assert_array_equal(out.mask, data > 150)
    with pytest.raises(InputError, match="no vessel voxel"):
        mask_from_array(data.astype(np.float16), threshold=1e300)


# --------------------------------------------------------------------------- #
# Spacing plausibility
# --------------------------------------------------------------------------- #


def _unitless_nifti(path, pixdim, shape=(6, 7, 8)):
    """A NIfTI of ``_volume(shape)`` with pixdim ``(x, y, z)`` and no unit.

    ``xyzt_units`` 0 is NIFTI_UNITS_UNKNOWN in the NIfTI-1 standard (nifti1.h).
    """
    img = nib.Nifti1Image(np.ascontiguousarray(_volume(shape).T), np.diag([*pixdim, 1.0]))
    img.header.set_xyzt_units(0)
    nib.save(img, path)
    return path


@pytest.mark.parametrize(
    ("pixdim", "spacing", "source", "unit_word"),
    [
        # A two-photon voxel (x, y, z): 0.6 x 0.6 x 2 µm; as mm it would be
        # 600 µm pixels, far coarser than any microscope or micro-CT voxel.
        ((0.6, 0.6, 2.0), (2.0, 0.6, 0.6), "nifti-no-unit-um", "micrometres"),
        # 1 µm voxels stored in mm; as µm they would be 1 nm, below optical resolution.
        ((0.001, 0.001, 0.001), (1.0, 1.0, 1.0), "nifti-no-unit-mm", "millimetres"),
    ],
)
def test_unitless_nifti_takes_the_only_plausible_unit_and_records_it(tmp_path, pixdim, spacing, source, unit_word):
    path = _unitless_nifti(tmp_path / "u.nii.gz", pixdim)
    out = read_mask(path)
    assert out.spacing == pytest.approx(spacing)
    assert out.spacing_source == source
    notes = [w for w in out.warnings if "gives no spatial unit" in w]
    assert len(notes) == 1
    assert unit_word in notes[0] and str(path) in notes[0] and "spacing=(dz, dy, dx)" in notes[0]
    # A spacing argument replaces the header, and with it the note on its unit.
    out = read_mask(path, spacing=(3.0, 0.5, 0.5))
    assert out.spacing_source == "argument"
    assert not any("gives no spatial unit" in w for w in out.warnings)


@pytest.mark.parametrize(
    ("pixdim", "why"),
    [
        # 0.08 µm (oversampled super-resolution) or 80 µm (micro-CT): both plausible.
        ((0.08, 0.08, 0.08), "plausible both as µm and as mm"),
        # 0.001 µm or 5000 µm on some axis: neither.
        ((0.001, 0.001, 5.0), "plausible neither as µm nor as mm"),
    ],
)
def test_unitless_nifti_without_a_clear_unit_asks_for_spacing(tmp_path, pixdim, why):
    path = _unitless_nifti(tmp_path / "u.nii", pixdim)
    with pytest.raises(InputError, match=r"spacing=\(dz, dy, dx\)") as info:
        read_mask(path)
    message = str(info.value)
    assert "gives no spatial unit" in message and why in message and str(path) in message
    assert "\n" not in message
    # An explicit spacing settles it.
    out = read_mask(path, spacing=(2.0, 0.6, 0.6))
    assert out.spacing == (2.0, 0.6, 0.6) and out.spacing_source == "argument"


# Voxel sizes of real stacks (dz, dy, dx), µm: two-photon, confocal,
# light-sheet, micro-CT (the ranges of the presets in configs/).
PLAUSIBLE_SPACINGS = [SPACING, (1.0, 1.0, 1.0), (5.0, 1.0, 1.0), (3.0, 0.6, 0.6), (0.3, 0.1, 0.1),
                      (20.0, 20.0, 20.0), (1.0, 2.0, 2.0)]

IMPLAUSIBLE_SPACINGS = [
    # (0.6, 0.6, 3) µm in X Y Z order given as Z Y X: in-plane axes 5x apart, z finest.
    ((0.6, 0.6, 3.0), "(0.6, 0.6, 3)", "order"),
    # 2 x 0.6 x 0.6 µm written in nanometres.
    ((2000.0, 600.0, 600.0), "(2000, 600, 600)", "nanometres"),
    # 2 x 0.6 x 0.6 µm written in millimetres.
    ((0.002, 0.0006, 0.0006), "(0.002, 0.0006, 0.0006)", "millimetres"),
]


def _read_with_spacing(how, tmp_path, spacing, **kwargs):
    data = _volume()
    if how == "argument":
        path = tmp_path / "m.npy"
        np.save(path, data)
        return read_mask(path, spacing=spacing, **kwargs)
    if how == "npz":
        path = tmp_path / "m.npz"
        np.savez(path, mask=data, spacing=np.array(spacing))
        return read_mask(path, **kwargs)
    return mask_from_array(data, spacing=spacing, **kwargs)


@pytest.mark.parametrize("how", ["argument", "npz", "array"])
@pytest.mark.parametrize("spacing", PLAUSIBLE_SPACINGS)
def test_plausible_spacing_gives_no_warning(tmp_path, how, spacing):
    out = _read_with_spacing(how, tmp_path, spacing, implausible_spacing="error")
    assert out.spacing == spacing
    assert not any("spacing" in w for w in out.warnings)


@pytest.mark.parametrize("how", ["argument", "npz", "array"])
@pytest.mark.parametrize(("spacing", "shown", "mistake"), IMPLAUSIBLE_SPACINGS)
def test_implausible_spacing_warns_once_or_fails_when_asked(tmp_path, how, spacing, shown, mistake):
    out = _read_with_spacing(how, tmp_path, spacing)
    assert out.spacing == spacing  # a warning, the values are kept
    hits = [w for w in out.warnings if "voxel spacing" in w]
    assert len(hits) == 1
    assert shown in hits[0] and mistake in hits[0] and "\n" not in hits[0]
    with pytest.raises(InputError, match="implausible_spacing") as info:
        _read_with_spacing(how, tmp_path, spacing, implausible_spacing="error")
    assert shown in str(info.value) and mistake in str(info.value)


def test_planar_spacing_checks_in_plane_values_only(tmp_path):
    plane = _volume()[2]
    assert not mask_from_array(plane, spacing=(0.6, 0.6), implausible_spacing="error").warnings
    with pytest.raises(InputError, match="nanometres"):
        mask_from_array(plane, spacing=(600.0, 600.0), implausible_spacing="error")


@pytest.mark.parametrize("mode", ["ignore", None, True])
def test_bad_implausible_spacing_option_fails(tmp_path, mode):
    with pytest.raises(InputError, match=r"implausible_spacing: expected 'warn' or 'error', got"):
        mask_from_array(_volume(), spacing=SPACING, implausible_spacing=mode)


def test_implausible_spacing_error_from_config_writes_nothing(tmp_path):
    path = tmp_path / "m.npy"
    np.save(path, _volume())
    out = tmp_path / "res"
    with pytest.raises(InputError, match=r"nanometres.*input\.implausible_spacing"):
        analyze_file(path, out, spacing=(2000, 600, 600), config={"input": {"implausible_spacing": "error"}})
    assert not out.exists()


# --------------------------------------------------------------------------- #
# Memory of the isotropic thinning grid
# --------------------------------------------------------------------------- #


@pytest.mark.parametrize(
    ("spacing", "max_anisotropy", "resample"),
    [
        ((2.0, 0.5, 0.5), 1.5, None),  # anisotropic: the finest spacing
        ((2.0, 0.5, 0.5), 1.5, 0.7),  # anisotropic: the configured spacing
        ((1.2, 1.0, 1.0), 1.5, None),  # below the anisotropy limit: no grid
        ((1.0, 1.0, 1.0), 1.5, 0.5),  # isotropic, resampled on request
        ((1.0, 1.0, 1.0), 1.5, 1.0),  # already at the requested spacing: no grid
    ],
)
def test_thinning_grid_shape_is_the_grid_centrelines_thins_on(spacing, max_anisotropy, resample):
    mask, _ = synthetic.rasterize(synthetic.straight_tube(length_um=12, radius_um=2.5), spacing=spacing)
    cl = centrelines.extract_centrelines(mask, spacing=spacing, offset=(0, 0, 0), original_shape=mask.shape,
                                         max_anisotropy=max_anisotropy, resample_spacing_um=resample)
    grid = reading.thinning_grid_shape(mask.shape, spacing, max_anisotropy=max_anisotropy,
                                       resample_spacing_um=resample)
    if cl.resampled:
        assert grid == cl.grid_shape
    else:
        assert grid is None


@pytest.mark.parametrize(
    ("options", "grid"),
    [
        ({"resample_spacing_um": 0.1}, "101 x 31 x 18 voxels"),
        ({"max_anisotropy": 1.5}, "41 x 13 x 8 voxels"),  # finest spacing, 0.25 µm
    ],
)
def test_memory_check_counts_the_resampled_grid(tmp_path, options, grid):
    path = tmp_path / "m.npy"
    np.save(path, _volume((6, 7, 8)))
    limit = 2 * estimate_memory_bytes((6, 7, 8))
    assert read_mask(path, spacing=SPACING, memory_limit_bytes=limit).shape == (6, 7, 8)
    with pytest.raises(InputError, match="needs about") as info:
        read_mask(path, spacing=SPACING, memory_limit_bytes=limit, **options)
    assert grid in str(info.value)


TWO_PHOTON = ROOT / "configs" / "two-photon-window.yaml"


@pytest.mark.parametrize("case", ["nifti-says-mm", "spacing-in-nm"])
def test_1000x_spacing_with_two_photon_preset_is_exit_2_before_any_work(tmp_path, capsys, case):
    # 0.6 x 0.6 x 2 µm voxels taken as 600 x 600 x 2000 µm: the preset's 1 µm
    # thinning grid would have about 1e14 voxels.
    data = _volume((64, 64, 64))
    if case == "nifti-says-mm":
        path = tmp_path / "m.nii.gz"
        img = nib.Nifti1Image(np.ascontiguousarray(data.T), np.diag([0.6, 0.6, 2.0, 1.0]))
        img.header.set_xyzt_units("mm")  # the values are µm, the header says mm
        nib.save(img, path)
        extra = []
    else:
        path = tmp_path / "m.npy"
        np.save(path, data)
        extra = ["--spacing", "2000", "600", "600"]
    out = tmp_path / "res"
    code = main(["analyze", str(path), "-o", str(out), "--quiet", "--config", str(TWO_PHOTON), *extra])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2
    assert len(err) == 1 and err[0].startswith("vesselflow: error: ")
    assert "needs about" in err[0] and "resampled to 1 µm" in err[0]
    assert "(2000, 600, 600)" in err[0] and "nanometres" in err[0]
    assert not out.exists()


def test_analyze_checks_memory_of_the_resampled_grid_before_work():
    with pytest.raises(InputError, match=r"mask array \(64 x 64 x 64 voxels; .* resampled to 1 µm.*needs about"):
        analyze(_volume((64, 64, 64)), spacing=(2000.0, 600.0, 600.0),
                config={"centrelines": {"resample_spacing_um": 1.0}})


# --------------------------------------------------------------------------- #
# Plausibility of the measured radii
# --------------------------------------------------------------------------- #


@pytest.mark.parametrize(("scale", "warned"), [(1.0, False), (500.0, True), (0.01, True)])
def test_implausible_median_radius_is_a_run_warning(scale, warned):
    # A 4-voxel radius tube: 4 µm at 1 µm voxels, 2 mm at 500 µm, 0.04 µm at 10 nm.
    mask, _ = synthetic.rasterize(synthetic.straight_tube(length_um=60, radius_um=4), spacing=(1, 1, 1))
    config = {"cleaning": {"min_object_volume_um3": 0.0},
              "pruning": {"min_spur_length_um": 0.0, "min_fragment_length_um": 0.0}}
    res = analyze(mask, spacing=(scale, scale, scale), config=config)
    hits = [w for w in res.run["warnings"] if "median vessel radius" in w]
    assert len(hits) == int(warned)
    if warned:
        assert "spacing" in hits[0]

"""Chunked volumes: OME-Zarr (NGFF 0.4 and 0.5), plain Zarr, HDF5 and TIFF read part by part.

Stores are written here with zarr-python and h5py directly, in the layouts
the OME-NGFF specification describes (https://ngff.openmicroscopy.org,
versions 0.4 and 0.5: "multiscales" with "axes" carrying "type" and "unit",
and per-level "coordinateTransformations" of type "scale"), so the reader is
checked against the format, not against the project's own writer.
"""

import json
import os

import h5py
import numpy as np
import pytest
import tifffile
import zarr

from pipeline import synthetic
from pipeline.cli import main
from pipeline.errors import InputError
from pipeline.reading import open_mask, read_mask
from pipeline.synthetic.raster import BlockRaster


@pytest.fixture(scope="module")
def tube():
    mask, _ = synthetic.rasterize(synthetic.straight_tube(length_um=50, radius_um=4, direction=(0, 1, 1)),
                                  spacing=(2, 1, 1))
    return mask


def _ome(path, mask, *, scale, units=("micrometer",) * 3, version="0.4", axes="zyx", extra=None):
    fmt = 2 if version == "0.4" else 3
    root = zarr.open_group(str(path), mode="w", zarr_format=fmt)
    arr = root.create_array("s0", shape=mask.shape, chunks=(16,) * mask.ndim, dtype="uint8")
    arr[...] = mask.astype(np.uint8) * 255
    names = list(axes)
    ms = {"version": version, "name": "vessels",
          "axes": [{"name": n, "type": {"t": "time", "c": "channel"}.get(n, "space"),
                    **({"unit": units[names.index(n) - (len(names) - 3)]} if n in "zyx" else {})} for n in names],
          "datasets": [{"path": "s0", "coordinateTransformations": [{"type": "scale", "scale": list(scale)}]},
                       {"path": "s1", "coordinateTransformations": [{"type": "scale",
                                                                     "scale": [2 * v for v in scale]}]}]}
    if extra:
        ms.update(extra)
    if version == "0.4":
        root.attrs["multiscales"] = [ms]
    else:
        root.attrs["ome"] = {"version": version, "multiscales": [ms]}
    return path


@pytest.mark.parametrize("version", ["0.4", "0.5"])
def test_ome_zarr_full_resolution_and_spacing(tmp_path, tube, version):
    path = _ome(tmp_path / "a.ome.zarr", tube, scale=(2.0, 1.0, 1.0), version=version)
    img = read_mask(path)
    assert np.array_equal(img.mask, tube)
    assert img.spacing == (2.0, 1.0, 1.0) and img.spacing_source == "ome-zarr"


def test_ome_zarr_units_and_a_global_scale(tmp_path, tube):
    # nanometres, and a multiscale-wide scale multiplying the level's (NGFF 0.4 "coordinateTransformations")
    path = _ome(tmp_path / "nm.ome.zarr", tube, scale=(1000.0, 500.0, 500.0), units=("nanometer",) * 3,
                extra={"coordinateTransformations": [{"type": "scale", "scale": [2.0, 2.0, 2.0]}]})
    assert read_mask(path).spacing == pytest.approx((2.0, 1.0, 1.0))


def test_ome_zarr_time_and_channel_axes_of_one(tmp_path, tube):
    path = _ome(tmp_path / "tc.ome.zarr", tube[None, None], scale=(1, 1, 2.0, 1.0, 1.0), axes="tczyx")
    img = read_mask(path)
    assert img.mask.shape == tube.shape and img.spacing == (2.0, 1.0, 1.0)


def test_ome_zarr_two_channels_are_refused(tmp_path, tube):
    two = np.stack([tube, tube])
    path = _ome(tmp_path / "c2.ome.zarr", two, scale=(1, 2.0, 1.0, 1.0), axes="czyx")
    with pytest.raises(InputError, match="channel"):
        read_mask(path)


def test_plain_zarr_array_and_named_arrays(tmp_path, tube):
    arr = zarr.open_array(str(tmp_path / "plain.zarr"), mode="w", shape=tube.shape, chunks=(8, 16, 16), dtype=bool)
    arr[...] = tube
    img = read_mask(tmp_path / "plain.zarr", spacing=(2, 1, 1))
    assert np.array_equal(img.mask, tube)
    g = zarr.open_group(str(tmp_path / "two.zarr"), mode="w")
    for name in ("raw", "labels"):
        a = g.create_array(name, shape=tube.shape, dtype="uint8")
        a[...] = tube
    with pytest.raises(InputError, match="found arrays: .*labels.*raw|found arrays: .*raw.*labels"):
        read_mask(tmp_path / "two.zarr")
    assert np.array_equal(read_mask(tmp_path / "two.zarr", dataset="labels").mask, tube)
    assert np.array_equal(read_mask(f"{tmp_path / 'two.zarr'}:/labels").mask, tube)
    with pytest.raises(InputError, match="no array 'other'"):
        read_mask(tmp_path / "two.zarr", dataset="other")


def test_hdf5_dataset_spacing_and_paths(tmp_path, tube):
    path = tmp_path / "stack.h5"
    with h5py.File(path, "w") as f:
        d = f.create_dataset("seg/vessels", data=tube.astype(np.uint8), chunks=(8, 16, 16), compression="gzip")
        d.attrs["element_size_um"] = [2.0, 1.0, 1.0]
    img = read_mask(path)
    assert np.array_equal(img.mask, tube) and img.spacing == (2.0, 1.0, 1.0)
    assert np.array_equal(read_mask(f"{path}:/seg/vessels").mask, tube)
    with pytest.raises(InputError, match="no dataset '/seg/missing'"):
        read_mask(path, dataset="/seg/missing")
    with h5py.File(path, "a") as f:
        f.create_dataset("raw", data=np.zeros((2, 2, 2), np.uint8))
    with pytest.raises(InputError, match="expected a single dataset, found: /raw, /seg/vessels"):
        read_mask(path)


def test_chunks_that_do_not_decode_are_one_line(tmp_path, tube):
    path = _ome(tmp_path / "bad.ome.zarr", tube, scale=(2.0, 1.0, 1.0))
    chunk = next(p for p in sorted((path / "s0").iterdir()) if not p.name.startswith("."))
    chunk.write_bytes(b"not a compressed chunk")
    with pytest.raises(InputError, match="cannot be read") as err:
        read_mask(path)
    assert "\n" not in str(err.value)


def test_lazy_reading_reads_only_what_is_sliced(tmp_path, tube):
    path = _ome(tmp_path / "lazy.ome.zarr", tube, scale=(2.0, 1.0, 1.0))
    with open_mask(path) as lazy:
        assert lazy.shape == tube.shape and lazy.spacing == (2.0, 1.0, 1.0)
        assert np.array_equal(lazy.source[3:7] != 0, tube[3:7])
    tif = tmp_path / "planes.tif"
    synthetic.write_volume(tif, tube, spacing=(2, 1, 1))
    with open_mask(tif) as lazy:
        assert np.array_equal(lazy.source[5:9, 2:30] != 0, tube[5:9, 2:30])
        assert np.array_equal(lazy.source[4] != 0, tube[4])


def test_synth_writes_ome_zarr_block_by_block(tmp_path):
    """The block-wise painter gives rasterize's mask exactly; the store reads back through the OME-Zarr reader."""
    net = synthetic.capillary_bed(shape_um=(70, 70, 70), seed=2)
    whole, truth = synthetic.rasterize(net, spacing=(2, 1, 1), roughness=0.2, seed=4)
    br = BlockRaster(net, spacing=(2, 1, 1), roughness=0.2, seed=4)
    assert br.shape == whole.shape
    out = np.zeros_like(whole)
    for lo in np.ndindex(*(-(-n // 24) for n in whole.shape)):
        a = [i * 24 for i in lo]
        b = [min(x + 24, n) for x, n in zip(a, whole.shape)]
        out[a[0]:b[0], a[1]:b[1], a[2]:b[2]] = br.paint(a, b)
    assert np.array_equal(out, whole)
    assert br.truth(int(whole.sum()))["summary"] == truth["summary"]
    path = tmp_path / "bed.ome.zarr"
    assert main(["synth", "bed", "--size", "70", "70", "70", "--spacing", "2", "1", "1", "--roughness", "0.2",
                 "--seed", "4", "-o", str(path), "--quiet"]) == 0
    img = read_mask(path)
    assert img.spacing == (2.0, 1.0, 1.0)
    written = json.loads((tmp_path / "bed.truth.json").read_text())
    assert written["mask_voxels"] == int(img.mask.sum())


def test_cli_bad_chunked_inputs_exit_2_and_write_nothing(tmp_path, tube, capsys):
    two = zarr.open_group(str(tmp_path / "two.zarr"), mode="w")
    for name in ("a", "b"):
        two.create_array(name, shape=(4, 4, 4), dtype="uint8")
    h5 = tmp_path / "s.h5"
    with h5py.File(h5, "w") as f:
        f.create_dataset("m", data=tube.astype(np.uint8))
    bad = _ome(tmp_path / "bad.ome.zarr", tube, scale=(2.0, 1.0, 1.0))
    chunk = next(p for p in sorted((bad / "s0").iterdir()) if not p.name.startswith("."))
    chunk.write_bytes(b"garbage")
    cases = [
        ([str(tmp_path / "two.zarr")], "found arrays: a, b"),
        ([f"{h5}:/nope"], "no dataset '/nope'"),
        ([str(bad), "--blockwise"], "cannot be read"),
        ([str(bad)], "cannot be read"),
        ([str(h5), "--spacing", "2", "1", "1", "--blockwise", "--memory-limit", "20MB"],
         "--memory-limit: expected at least"),
        ([str(h5), "--spacing", "2", "1", "1", "--blockwise", "--block-size", "33"],
         "--block-size: expected an even number"),
        ([str(h5), "--memory-limit", "lots"], "--memory-limit: expected a size"),
    ]
    for args, message in cases:
        out = tmp_path / "res"
        assert main(["analyze", *args, "-o", str(out), "--quiet"]) == 2, args
        err = capsys.readouterr().err.strip().splitlines()
        assert len(err) == 1 and message in err[0], (args, err)
        assert not out.exists()
    assert sorted(os.listdir(tmp_path)) == ["bad.ome.zarr", "s.h5", "two.zarr"]


def test_cli_blockwise_from_ome_zarr_equals_in_memory(tmp_path):
    path = tmp_path / "bed.ome.zarr"
    assert main(["synth", "bed", "--size", "90", "90", "90", "--spacing", "2", "1", "1", "--seed", "1",
                 "-o", str(path), "--quiet"]) == 0
    assert main(["analyze", str(path), "-o", str(tmp_path / "mem"), "--quiet"]) == 0
    assert main(["analyze", str(path), "-o", str(tmp_path / "blk"), "--blockwise", "--block-size", "32",
                 "--quiet"]) == 0
    for name in ("segments.csv", "nodes.csv", "bifurcations.csv", "summary.json"):
        assert (tmp_path / "mem" / name).read_bytes() == (tmp_path / "blk" / name).read_bytes(), name
    run = json.loads((tmp_path / "blk" / "run.json").read_text())
    assert run["blockwise"]["blocks"] > 1 and run["input"]["sha256"]
    assert "blockwise" not in json.loads((tmp_path / "mem" / "run.json").read_text())


def test_tiff_stack_blockwise_reads_plane_by_plane(tmp_path, tube):
    tif = tmp_path / "stack.tif"
    tifffile.imwrite(tif, tube.astype(np.uint8) * 255, imagej=True, resolution=(1.0, 1.0),
                     metadata={"spacing": 2.0, "unit": "um", "axes": "ZYX"})
    assert main(["analyze", str(tif), "-o", str(tmp_path / "blk"), "--blockwise", "--block-size", "32",
                 "--quiet"]) == 0
    assert main(["analyze", str(tif), "-o", str(tmp_path / "mem"), "--quiet"]) == 0
    assert (tmp_path / "mem" / "segments.csv").read_bytes() == (tmp_path / "blk" / "segments.csv").read_bytes()

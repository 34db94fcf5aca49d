"""The command line: outputs, exit codes, refusal to overwrite, bad input."""

import json
import pickle
import subprocess
import sys

import networkx as nx
import numpy as np
import pandas as pd
import pytest
import tifffile

from pipeline import batch, synthetic
from pipeline.cli import _message, main
from pipeline.errors import InputError, StorageError
from pipeline.scoring import check_score_file
from pipeline.tables import RESULT_FILES, check_new_file, load_result


@pytest.fixture(scope="module")
def tube_tif(tmp_path_factory):
    d = tmp_path_factory.mktemp("cli")
    mask, truth = synthetic.rasterize(synthetic.y_branch(parent_radius_um=5, parent_length_um=40,
                                                         daughter_length_um=40), spacing=(2, 1, 1))
    path = d / "ybranch.tif"
    synthetic.write_volume(path, mask, spacing=(2, 1, 1), truth=truth)
    return path


def test_analyze_writes_complete_folder(tube_tif, tmp_path, capsys):
    out = tmp_path / "res"
    assert main(["analyze", str(tube_tif), "-o", str(out), "--quiet"]) == 0
    assert sorted(p.name for p in out.iterdir()) == sorted(RESULT_FILES)
    run = json.loads((out / "run.json").read_text())
    assert run["spacing_um"] == [2.0, 1.0, 1.0] and run["spacing_source"] == "imagej"
    assert len(run["input"]["sha256"]) == 64
    assert set(run["timings_s"]) >= {"reading", "cleaning", "centrelines", "graph", "measures"}
    assert run["config"]["pruning"]["spur_radius_factor"] == 1.5
    segs = pd.read_csv(out / "segments.csv")
    nodes = pd.read_csv(out / "nodes.csv")
    assert {"segment_id", "node_from", "node_to", "length_um", "radius_um"} <= set(segs.columns)
    assert {"node_id", "z", "y", "x", "z_um", "y_um", "x_um", "degree", "kind"} <= set(nodes.columns)
    # Voxel (i, j, k) has its centre at (i dz, j dy, k dx).
    assert np.allclose(nodes["z"] * 2.0, nodes["z_um"], atol=1.0)
    # The joins hold and the GraphML reads back into networkx with the same shape.
    assert set(segs["node_from"]) | set(segs["node_to"]) <= set(nodes["node_id"])
    g = nx.read_graphml(out / "graph.graphml", force_multigraph=True)
    assert g.number_of_edges() == len(segs) and g.number_of_nodes() == len(nodes)
    res = load_result(out)
    assert len(res.centrelines) == len(segs)


def test_refuses_non_empty_output_without_overwrite(tube_tif, tmp_path, capsys):
    out = tmp_path / "res"
    out.mkdir()
    (out / "keep.txt").write_text("mine")
    assert main(["analyze", str(tube_tif), "-o", str(out), "--quiet"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "--overwrite" in err[0]
    assert (out / "keep.txt").read_text() == "mine"
    # A folder of the user's files is never replaced, --overwrite or not.
    assert main(["analyze", str(tube_tif), "-o", str(out), "--quiet", "--overwrite"]) == 2
    assert (out / "keep.txt").read_text() == "mine" and not (out / "run.json").exists()


def _bad_inputs(tmp):
    corrupt = tmp / "corrupt.tif"
    ok = np.zeros((10, 32, 32), np.uint8)
    ok[3:7, 10:20, :] = 255
    tifffile.imwrite(tmp / "full.tif", ok)
    corrupt.write_bytes((tmp / "full.tif").read_bytes()[:600])
    empty = tmp / "empty.npy"
    np.save(empty, np.zeros((8, 8, 8), np.uint8))
    full = tmp / "all.npy"
    np.save(full, np.ones((8, 8, 8), np.uint8))
    four = tmp / "four.npy"
    np.save(four, np.ones((2, 3, 8, 8), np.uint8))
    prob = tmp / "prob.npy"
    np.save(prob, np.random.default_rng(0).random((8, 8, 8)).astype(np.float32))
    (tmp / "mask.xyz").write_text("x")
    return {
        "missing": ([str(tmp / "nope.tif")], "does not exist"),
        "corrupt": ([str(corrupt)], "truncated or corrupt"),
        "extension": ([str(tmp / "mask.xyz")], ".tif"),
        "empty": ([str(empty)], "no vessel"),
        "all": ([str(full)], "every voxel is vessel"),
        "4-D": ([str(four)], "axes"),
        "probability": ([str(prob)], "threshold"),
        "zero spacing": ([str(tmp / "full.tif"), "--spacing", "0", "1", "1"], "spacing"),
        "nan spacing": ([str(tmp / "full.tif"), "--spacing", "1", "nan", "1"], "spacing"),
    }


@pytest.mark.parametrize("case", ["missing", "corrupt", "extension", "empty", "all", "4-D", "probability",
                                  "zero spacing", "nan spacing"])
def test_bad_input_one_line_exit_2_nothing_written(case, tmp_path, capsys):
    args, fragment = _bad_inputs(tmp_path)[case]
    out = tmp_path / "out"
    assert main(["analyze", *args, "-o", str(out)]) == 2
    err = [ln for ln in capsys.readouterr().err.splitlines() if "error" in ln]
    assert len(err) == 1 and fragment in err[0], err
    assert not out.exists()
    assert not any(p.name.startswith(".out") for p in tmp_path.iterdir())


def test_bad_config_exit_2(tube_tif, tmp_path, capsys):
    cfg = tmp_path / "c.yaml"
    cfg.write_text("pruning:\n  spur_radius_factr: 2\n")
    assert main(["analyze", str(tube_tif), "-o", str(tmp_path / "o"), "--config", str(cfg)]) == 2
    assert "pruning.spur_radius_factr" in capsys.readouterr().err


def test_threshold_binarises_probability_maps(tmp_path):
    mask, _ = synthetic.rasterize(synthetic.straight_tube(length_um=40, radius_um=4), spacing=(1, 1, 1))
    prob = np.where(mask, 0.9, 0.1).astype(np.float32)
    np.save(tmp_path / "p.npy", prob)
    assert main(["analyze", str(tmp_path / "p.npy"), "-o", str(tmp_path / "o"), "--threshold", "0.5",
                 "--spacing", "1", "1", "1", "--quiet"]) == 0
    assert len(pd.read_csv(tmp_path / "o" / "segments.csv")) == 1


def test_missing_spacing_warns_and_is_recorded(tmp_path, capsys):
    mask, _ = synthetic.rasterize(synthetic.straight_tube(length_um=40, radius_um=4), spacing=(1, 1, 1))
    np.save(tmp_path / "m.npy", mask)
    assert main(["analyze", str(tmp_path / "m.npy"), "-o", str(tmp_path / "o"), "--quiet"]) == 0
    assert "assuming 1 µm" in capsys.readouterr().err
    run = json.loads((tmp_path / "o" / "run.json").read_text())
    assert run["spacing_source"] == "default" and any("assuming 1 µm" in w for w in run["warnings"])


def test_usage_errors_exit_2():
    # argparse exits 2 on usage errors; run as a subprocess to see the real exit code.
    proc = subprocess.run([sys.executable, "-m", "pipeline", "analyze"], capture_output=True, text=True)
    assert proc.returncode == 2 and "required" in proc.stderr


def test_synth_writes_volume_and_truth(tmp_path):
    out = tmp_path / "new" / "t.tif"  # a folder that does not exist yet
    assert main(["synth", "tube", "-o", str(out), "--spacing", "2", "1", "1"]) == 0
    assert out.exists() and (out.parent / "t.truth.json").exists()
    assert main(["synth", "tube", "-o", str(out)]) == 2  # exists, no --overwrite


def test_synth_artefacts_make_a_hostile_phantom(tmp_path, capsys):
    out = tmp_path / "tree.tif"
    assert main(["synth", "tree", "-o", str(out), "--artefacts", "1", "--seed", "3", "--quiet"]) == 0
    truth = json.loads((tmp_path / "tree.truth.json").read_text())
    # The preset at full strength (pipeline.synthetic.HOSTILE_AT_FULL_STRENGTH), recorded in the truth.
    assert truth["rasterize"]["roughness"] == synthetic.HOSTILE_AT_FULL_STRENGTH["roughness"]
    assert len(truth["blobs"]) == synthetic.HOSTILE_AT_FULL_STRENGTH["blobs"] and truth["jitter"]
    # An explicit option overrides the preset's.
    smooth = tmp_path / "smooth.tif"
    assert main(["synth", "tree", "-o", str(smooth), "--artefacts", "1", "--roughness", "0.1", "--quiet"]) == 0
    assert json.loads((tmp_path / "smooth.truth.json").read_text())["rasterize"]["roughness"] == 0.1
    bad = tmp_path / "bad.tif"
    assert main(["synth", "tree", "-o", str(bad), "--artefacts", "2", "--quiet"]) == 2
    assert not bad.exists()
    assert "--artefacts: expected a strength in [0, 1], got 2" in capsys.readouterr().err


def test_flow_options(tube_tif, tmp_path):
    base = tmp_path / "flow"
    assert main(["analyze", str(tube_tif), "-o", str(base), "--quiet", "--blind-ends", "outlet"]) == 0
    segs = pd.read_csv(base / "segments.csv")
    nodes = pd.read_csv(base / "nodes.csv")
    assert segs["perfused"].all() and (segs["wss_pa"] > 0).all()
    assert set(nodes["role"]) == {"inlet", "outlet", "internal"}
    summary = json.loads((base / "summary.json").read_text())
    assert summary["total_inflow_nl_min"] > 0 and summary["bifurcations"] == 1
    # Sealed blind ends: the Y's only border end is then its only opening, so nothing flows.
    sealed = tmp_path / "sealed"
    assert main(["analyze", str(tube_tif), "-o", str(sealed), "--quiet", "--blind-ends", "sealed"]) == 0
    assert not pd.read_csv(sealed / "segments.csv")["perfused"].any()
    # Open blind ends (the default) in a piece that reaches the border: the
    # estimate perfuses the whole Y; fixed pressures need named outlets.
    estimated = tmp_path / "estimated"
    assert main(["analyze", str(tube_tif), "-o", str(estimated), "--quiet"]) == 0
    assert pd.read_csv(estimated / "segments.csv")["perfused"].all()
    assert json.loads((estimated / "run.json").read_text())["flow"]["boundary"] == "estimate"
    off = tmp_path / "noflow"
    assert main(["analyze", str(tube_tif), "-o", str(off), "--quiet", "--no-flow"]) == 0
    assert "flow_nl_min" not in pd.read_csv(off / "segments.csv").columns
    assert json.loads((off / "run.json").read_text())["config"]["flow"]["enabled"] is False
    # An explicit root by node id moves the inlet.
    end = int(nodes.loc[nodes["kind"] == "blind", "node_id"].iloc[0])
    moved = tmp_path / "moved"
    assert main(["analyze", str(tube_tif), "-o", str(moved), "--quiet", "--blind-ends", "outlet",
                 "--root", f"node:{end}"]) == 0
    roles = pd.read_csv(moved / "nodes.csv").set_index("node_id")["role"]
    assert roles[end] == "inlet"
    assert main(["analyze", str(tube_tif), "-o", str(tmp_path / "bad"), "--quiet", "--root", "node:999"]) == 2


def test_demo_analyses_every_volume_with_reports(tube_tif, tmp_path):
    out = tmp_path / "results"
    assert main(["demo", "-o", str(out), "--input-dir", str(tube_tif.parent), "--report", "--quiet"]) == 0
    folder = out / "ybranch"
    assert all((folder / f).is_file() for f in RESULT_FILES)
    assert (folder / "report.html").is_file()
    assert main(["demo", "-o", str(out), "--input-dir", str(tmp_path / "none"), "--quiet"]) == 2


# --- errors name Python parameters; the command line shows its options ---


def _bad_strength(tmp):
    synthetic.write_synthetic(tmp / "x.tif", "tube", artefacts=2.0)


def _bad_suffix(tmp):
    check_new_file(tmp / "x.jpg", suffix=".png")


def _existing_score_file(tmp):
    (tmp / "s.json").write_text("{}")
    check_score_file(tmp / "s.json")


@pytest.mark.parametrize("call, param", [(_bad_strength, "artefacts"), (_bad_suffix, "path"),
                                         (_existing_score_file, "path")])
def test_library_errors_name_parameters_not_options(tmp_path, call, param):
    # The library is called from Python, where '--overwrite' means nothing:
    # its messages name its parameters (and hints spell a call), and the
    # error carries the parameter for the command line to translate.
    with pytest.raises(InputError) as info:
        call(tmp_path)
    assert "--" not in str(info.value)
    assert info.value.param == param and str(info.value) == f"{param}: {info.value.detail}"
    assert not (tmp_path / "x.tif").exists()


def test_batch_option_errors_carry_the_parameter(tmp_path, tube_tif):
    samples = batch.collect_samples(tube_tif.parent)
    for kwargs, param in [({"workers": 0}, "workers"), ({"threads": -1}, "threads"),
                          ({"worker_timeout": 0}, "worker_timeout"), ({"memory_limit": "lots"}, "memory_limit")]:
        with pytest.raises(InputError) as info:
            batch.run_batch(samples, tmp_path / f"out-{param}", **kwargs)
        assert info.value.param == param and "--" not in str(info.value)
        assert not (tmp_path / f"out-{param}").exists()


@pytest.mark.parametrize("param, command, option", [
    ("worker_timeout", "batch", "--worker-timeout"),
    ("memory_limit", "batch", "--memory-limit"),
    ("mask_path", "view", "--mask"),
    ("mask", "report", "--mask"),
    ("mask", "analyze", "MASK"),
    ("path", "view", "--screenshot"),
    ("path", "score", "--output"),
    ("node_id", "view", "--bifurcation"),
    ("artefacts", "synth", "--artefacts"),
])
def test_the_command_line_shows_its_option_for_a_parameter(param, command, option):
    line = _message(InputError("expected X, got Y; pass overwrite=True to replace it", param=param), command)
    assert line == f"{option}: expected X, got Y; pass --overwrite to replace it"


def test_a_parameter_without_an_option_keeps_its_name():
    assert _message(InputError("expected a 3-D array", param="radius_um"), "analyze") == \
        "radius_um: expected a 3-D array"
    assert _message(InputError("no parameter here"), "analyze") == "no parameter here"


def test_the_parameter_survives_pickling():
    # Errors travel from Dask worker processes to the batch.
    for exc in (InputError("expected 1, got 2", param="workers"), StorageError("disk full")):
        back = pickle.loads(pickle.dumps(exc))
        assert type(back) is type(exc) and str(back) == str(exc) and back.param == exc.param


def test_probability_image_hint_shows_the_threshold_option(tmp_path, capsys):
    prob = np.random.default_rng(1).random((6, 7, 8)).astype(np.float32)
    path = tmp_path / "p.tif"
    tifffile.imwrite(path, prob)
    assert main(["analyze", str(path), "-o", str(tmp_path / "res"), "--quiet", "--spacing", "1", "1", "1"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "pass --threshold T to binarise" in err[0]
    assert not (tmp_path / "res").exists()


def test_a_reader_that_goes_away_is_no_error(tube_tif, tmp_path):
    # `vesselflow summarize DIR | head -1`: the pipe closes early; the command
    # stops quietly (exit 0, nothing on stderr), as Unix tools do.
    out = tmp_path / "res"
    assert main(["analyze", str(tube_tif), "-o", str(out), "--quiet"]) == 0
    proc = subprocess.Popen([sys.executable, "-m", "pipeline", "summarize", str(out)], stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE)
    proc.stdout.close()  # before the command has written anything: its first write meets a closed pipe
    _, err = proc.communicate(timeout=60)
    assert proc.returncode == 0 and err.decode() == ""

"""Tests of pipeline/viewer/ in a real napari viewer, headless under Xvfb with Mesa's software OpenGL.

The tests start their own Xvfb. Outside CI they are skipped when Xvfb or napari is
missing; with CI=true a missing piece fails them (``.ci/run`` installs Xvfb and Mesa).
"""

import csv
import os
import shutil
import subprocess

import numpy as np
import pytest

from pipeline import synthetic
from pipeline.cli import main

# napari 0.9 still builds pydantic models with v1-style options (json_encoders, extra Field
# keywords, allow_mutation), and npe2 does too: pydantic's deprecation warnings come from
# their code, not ours, so only those are let through here.
# integration: a real napari viewer under Xvfb
pytestmark = [pytest.mark.integration,
              pytest.mark.filterwarnings("ignore::pydantic.warnings.PydanticDeprecatedSince20")]

IN_CI = os.environ.get("CI") == "true"
SPACING = (2.0, 1.0, 1.0)  # anisotropic on purpose, so a wrong scale shows
MAGENTA = np.array([255, 0, 255])  # README.md: flagged bifurcations are drawn magenta


def _need(ok, why):
    if not ok:
        if IN_CI:
            pytest.fail(f"viewer tests must run in CI: {why}")
        pytest.skip(why)


@pytest.fixture(scope="module")
def display():
    """An Xvfb screen for this module; the display number is chosen by Xvfb (-displayfd)."""
    _need(shutil.which("Xvfb") is not None, "Xvfb is not installed")
    try:
        import napari  # noqa: F401
        import qtpy  # noqa: F401
    except ImportError as exc:
        _need(False, f"napari/Qt not installed ({exc})")
    read, write = os.pipe()
    proc = subprocess.Popen(["Xvfb", "-displayfd", str(write), "-screen", "0", "1280x1024x24", "-nolisten", "tcp"],
                            pass_fds=(write,), stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    os.close(write)
    with os.fdopen(read) as fh:
        number = fh.readline().strip()
    _need(number.isdigit(), "Xvfb did not start")
    saved = {k: os.environ.get(k) for k in ("DISPLAY", "QT_QPA_PLATFORM", "LIBGL_ALWAYS_SOFTWARE")}
    os.environ.update(DISPLAY=f":{number}", QT_QPA_PLATFORM="xcb", LIBGL_ALWAYS_SOFTWARE="1")
    yield f":{number}"
    for k, v in saved.items():
        if v is None:
            os.environ.pop(k, None)
        else:
            os.environ[k] = v
    proc.terminate()
    proc.wait(timeout=10)


@pytest.fixture(scope="module")
def folder(tmp_path_factory):
    """A broken Murray tree (several flagged junctions), analysed into a result folder."""
    root = tmp_path_factory.mktemp("viewer")
    net = synthetic.binary_tree(depth=3, root_radius_um=5.0, exponent=3.0, seed=3, broken_fraction=0.5,
                                broken_ratio=0.95, min_radius_um=2.0)
    mask, _ = synthetic.rasterize(net, spacing=SPACING)
    np.save(root / "tree.npy", mask)
    out = root / "tree"
    assert main(["analyze", str(root / "tree.npy"), "-o", str(out), "--spacing", *map(str, SPACING), "--quiet",
                 "--blind-ends", "outlet"]) == 0
    return out


def _rows(path):
    with open(path, newline="", encoding="utf-8") as fh:
        return list(csv.DictReader(fh))


def _camera(viewer):
    scene = getattr(viewer, "scene", None)  # napari 0.9 moved the camera to viewer.scene
    return scene.camera if scene is not None else viewer.camera


def _flagged(folder):
    return {int(r["node_id"]): r for r in _rows(folder / "bifurcations.csv") if r["flagged"] == "True"}


def test_layers_in_physical_units(display, folder):
    from pipeline import viewer as V

    v, panel = V.open_result(folder, show=False)
    try:
        names = [layer.name for layer in v.layers]
        for name in ("mask", "centrelines", "nodes", "flagged bifurcations"):
            assert name in names
        # The mask is shown in voxels scaled by the spacing the analysis was given (µm).
        assert tuple(v.layers["mask"].scale) == pytest.approx(SPACING)
        assert v.layers["mask"].data.shape == np.load(folder.parent / "tree.npy").shape
        # Points sit at the µm positions of nodes.csv (voxel (i,j,k) at (i dz, j dy, k dx)).
        nodes = _rows(folder / "nodes.csv")
        want = np.array([[float(n["z"]) * SPACING[0], float(n["y"]) * SPACING[1], float(n["x"]) * SPACING[2]]
                         for n in nodes])
        assert tuple(v.layers["nodes"].scale) == pytest.approx((1, 1, 1))
        # Node positions are junction-cluster centroids, voxel indices their rounding: within half a voxel.
        assert np.all(np.abs(v.layers["nodes"].data - want) <= 0.5 * np.array(SPACING) + 1e-9)
        flagged = _flagged(folder)
        assert len(v.layers["flagged bifurcations"].data) == len(flagged) > 0
        # Flagged markers not yet reviewed are magenta rings: transparent inside, so the vessels show.
        layer = v.layers["flagged bifurcations"]
        assert np.allclose(layer.border_color[:, :3], MAGENTA / 255)
        assert np.allclose(layer.face_color[:, 3], 0.0)
        from pipeline.viewer.panel import _scale_bar

        assert _scale_bar(v).visible  # a scale bar in µm on the canvas
        # The centrelines span the same world box as the mask (both in µm).
        lo, hi = v.layers["centrelines"].extent.world
        mlo, mhi = v.layers["mask"].extent.world
        assert np.all(lo >= mlo - 1) and np.all(hi <= mhi + 1)  # one µm of slack for the smoothing
        assert len(panel.table_rows()) == len(flagged)
    finally:
        v.close()


def test_stepping_centres_camera_on_bifurcation(display, folder):
    from pipeline import viewer as V

    flagged = _flagged(folder)
    v, panel = V.open_result(folder, show=False)
    try:
        base = _camera(v).zoom
        order = [int(r["node"]) for r in panel.table_rows()]
        # The queue opens most severe first (pipeline/bifurcations/table.py: severity).
        severity = [float(flagged[n]["severity"]) for n in order]
        assert severity == sorted(severity, reverse=True)
        panel.next()
        first = flagged[order[0]]
        # Expected centre: the junction's µm position from bifurcations.csv.
        want = [float(first[c]) for c in ("z_um", "y_um", "x_um")]
        assert np.allclose(_camera(v).center, want, atol=1e-6)
        assert _camera(v).zoom > base  # zoomed in on it
        panel.next()
        second = flagged[order[1]]
        assert np.allclose(_camera(v).center, [float(second[c]) for c in ("z_um", "y_um", "x_um")], atol=1e-6)
        panel.previous()
        assert np.allclose(_camera(v).center, want, atol=1e-6)
        assert f"junction {order[0]}" in panel.details.text()
        assert f"{float(first['radius_parent_um']):.3g}" in panel.details.text()  # parent radius shown
        # Sorting the table by exponent changes what Next means.
        panel.table.sortItems(4)
        exps = [float(r["murray_exponent"]) if r["murray_exponent"] else float("nan")
                for r in (flagged[int(x["node"])] for x in panel.table_rows())]
        finite = [e for e in exps if np.isfinite(e)]
        assert finite == sorted(finite)
    finally:
        v.close()


def test_review_survives_closing_and_reopening(display, folder, tmp_path):
    from pipeline import viewer as V

    out = tmp_path / "copy"
    shutil.copytree(folder, out)
    flagged = sorted(_flagged(out))
    v, panel = V.open_result(out, show=False)
    try:
        panel.goto(flagged[0])
        panel.decision_buttons["artefact"].click()
        panel.set_note("two vessels touching")
        panel.goto(flagged[1])
        panel.decision_buttons["confirmed"].click()
        assert (out / "review.csv").is_file()  # saved on every change
    finally:
        v.close()
    saved = {int(r["node_id"]): (r["decision"], r["note"]) for r in _rows(out / "review.csv")}
    assert saved == {flagged[0]: ("artefact", "two vessels touching"), flagged[1]: ("confirmed", "")}
    v, panel = V.open_result(out, show=False)
    try:
        shown = {int(r["node"]): (r["decision"], r["note"]) for r in panel.table_rows()}
        assert shown[flagged[0]] == ("artefact", "two vessels touching")
        assert shown[flagged[1]] == ("confirmed", "")
        assert all(shown[n] == ("", "") for n in flagged[2:])
        # The artefact marker turned grey (README.md: artefact grey).
        colours = dict(zip(v.layers["flagged bifurcations"].features["node_id"],
                           v.layers["flagged bifurcations"].border_color[:, :3].tolist()))
        assert np.allclose(colours[flagged[0]], [0.5, 0.5, 0.5])
        assert np.allclose(colours[flagged[2]], MAGENTA / 255)
    finally:
        v.close()


def test_plugin_reader_and_widget(display, folder):
    import napari

    v = napari.Viewer(show=False)
    try:
        v.open(str(folder), plugin="vesselflow")
        assert {"centrelines", "nodes", "flagged bifurcations"} <= {layer.name for layer in v.layers}
        _, panel = v.window.add_plugin_dock_widget("vesselflow", "Bifurcation review")
        assert panel.result is not None and panel.result.path.resolve() == folder.resolve()
        assert len(panel.table_rows()) == len(_flagged(folder))
    finally:
        v.close()


def test_screenshot_shows_the_junction_inside_its_ring(display, folder, tmp_path):
    from PIL import Image

    node = sorted(_flagged(folder))[0]
    shot = tmp_path / "junction.png"
    assert main(["view", str(folder), "--screenshot", str(shot), "--bifurcation", str(node),
                 "--size", "800", "600"]) == 0
    img = np.asarray(Image.open(shot).convert("RGB")).astype(int)  # read back with Pillow
    assert img.shape == (600, 800, 3)  # the size asked for, width then height
    assert img.std() > 10  # not blank: more than one colour on the canvas
    h, w, _ = img.shape
    centre = img[h // 2 - 2:h // 2 + 3, w // 2 - 2:w // 2 + 3]
    # The junction itself shows, not a marker: no magenta at the centre (the
    # markers are rings); 10 levels leave room for antialiasing.
    assert not np.any(np.abs(centre - MAGENTA).max(axis=-1) <= 10)
    assert centre.max() > 40  # something is drawn there: vessel or centreline, not the black background
    # The ring is there, round it.
    magenta = np.abs(img - MAGENTA).max(axis=-1) <= 10
    assert magenta.any() and magenta.mean() < 0.2
    assert main(["view", str(folder), "--screenshot", str(shot)]) == 2  # exists, no --overwrite


def test_view_rejects_bad_input(display, folder, tmp_path, capsys):
    nodes = _rows(folder / "nodes.csv")
    end = next(int(n["node_id"]) for n in nodes if n["kind"] != "junction")
    assert main(["view", str(folder), "--screenshot", str(tmp_path / "a.png"), "--bifurcation", str(end)]) == 2
    assert "not a bifurcation" in capsys.readouterr().err
    assert main(["view", str(folder), "--screenshot", str(tmp_path / "a.png"), "--bifurcation", "99999"]) == 2
    assert main(["view", str(tmp_path / "missing"), "--screenshot", str(tmp_path / "a.png")]) == 2
    assert "does not exist" in capsys.readouterr().err
    assert main(["view", str(folder), "--screenshot", str(tmp_path / "a.png"), "--size", "10", "10"]) == 2
    assert "--size" in capsys.readouterr().err
    assert not (tmp_path / "a.png").exists()


def test_keys_step_through_the_queue_and_record_decisions(display, folder, tmp_path):
    from pipeline import viewer as V

    out = tmp_path / "copy"
    shutil.copytree(folder, out)
    v, panel = V.open_result(out, show=False)
    try:
        keys = v.window._qt_viewer._key_map_handler  # the handler napari feeds real key presses to
        order = [int(r["node"]) for r in panel.table_rows()]
        keys.press_key("n")
        assert panel.current_node == order[0]
        keys.press_key("x")  # artefact
        keys.press_key("n")
        keys.press_key("c")  # confirmed
        keys.press_key("b")
        assert panel.current_node == order[0]
        saved = {int(r["node_id"]): r["decision"] for r in _rows(out / "review.csv")}
        assert saved == {order[0]: "artefact", order[1]: "confirmed"}
        # the parent and daughters of the junction under review are drawn and labelled
        labels = list(v.layers["current labels"].features["label"])
        assert labels[0] == "parent" and "daughter 1" in labels
        from pipeline.viewer.panel import _text_overlay

        assert f"junction {order[0]} (node id)" in _text_overlay(v).text
        before = v.dims.ndisplay
        panel.toggle_ndisplay()
        assert v.dims.ndisplay != before
    finally:
        v.close()

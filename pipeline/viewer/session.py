"""A viewer session over a result folder, and screenshots.

In: a result folder (and its mask). Out: a napari viewer with the result's layers and the review
panel (:func:`open_result`), or a PNG of the view (:func:`render_screenshot`, headless).
"""

from __future__ import annotations

from pathlib import Path

import napari
import numpy as np
from qtpy import QtCore, QtWidgets

from .. import review as rv, tables
from ..errors import InputError
from .panel import ReviewPanel, _camera


_SCREENSHOT_SIZE = (768, 1024)
_MIN_PIXELS, _MAX_PIXELS = 64, 8192
# Share of the screen's free area an opened window takes, each way.
_SCREEN_SHARE = 0.9


# ---------------------------------------------------------------------------
# entry points
# ---------------------------------------------------------------------------

def open_result(outdir, *, mask_path=None, colour_by="radius", show=True, viewer=None):
    """Open a result folder in a napari viewer with the review panel docked.

    Parameters
    ----------
    outdir : path
    mask_path : path, optional, keyword-only
        Default: the input recorded in ``run.json``.
    colour_by : str, keyword-only
    show : bool, keyword-only
        Show the window (False for screenshots and tests).
    viewer : napari.Viewer, optional, keyword-only
        Add to this viewer instead of a new one.

    Returns
    -------
    (napari.Viewer, ReviewPanel)

    Raises
    ------
    InputError
        Incomplete folder, invalid review, unreadable mask, unknown measure.
    """
    result = tables.load_result(outdir)
    rv.segment_measure(result, colour_by)  # fail before a window opens
    planar = bool(result.run.get("planar"))
    own = viewer is None
    if own:
        viewer = napari.Viewer(title=f"vesselflow: {Path(outdir).name}", ndisplay=2 if planar else 3, show=show)
    try:
        panel = ReviewPanel(viewer, outdir=outdir, mask_path=mask_path, colour_by=colour_by, add_layers=True)
        viewer.window.add_dock_widget(panel, name="Bifurcation review", area="right")
        if own and show:
            _fit_to_screen(viewer)
    except BaseException:
        if own:
            viewer.close()
        raise
    return viewer, panel


def _fit_to_screen(viewer):
    """Most of the screen for the window (napari opens small, with a canvas too narrow beside the panel)."""
    win = getattr(viewer.window, "_qt_window", None)
    screen = QtWidgets.QApplication.primaryScreen()
    if win is None or screen is None:
        return
    area = screen.availableGeometry()
    win.resize(int(area.width() * _SCREEN_SHARE), int(area.height() * _SCREEN_SHARE))
    win.move(area.x() + int(area.width() * (1 - _SCREEN_SHARE) / 2),
             area.y() + int(area.height() * (1 - _SCREEN_SHARE) / 2))


def _realise_hidden(viewer, size):
    # A never-shown Qt window has no GL surface and napari renders it black;
    # WA_DontShowOnScreen lets Qt create the surface without mapping a window.
    win = getattr(viewer.window, "_qt_window", None)
    if win is None:
        return
    win.setAttribute(QtCore.Qt.WidgetAttribute.WA_DontShowOnScreen, True)
    win.resize(size[1] + 400, size[0] + 200)
    win.show()
    QtWidgets.QApplication.processEvents()


def render_screenshot(outdir, path, *, mask_path=None, colour_by="radius", bifurcation=None, overwrite=False,
                      size=_SCREENSHOT_SIZE):
    """Render the canvas to a PNG file without showing a window.

    Parameters
    ----------
    outdir : path
        Result folder.
    path : path
        PNG file to write (atomically).
    mask_path, colour_by : keyword-only
        As for :func:`open_result`.
    bifurcation : int, optional, keyword-only
        Centre and zoom on this junction; default: the whole sample.
    overwrite : bool, keyword-only
        Replace an existing file.
    size : (int, int), keyword-only
        Height and width in pixels.

    Returns
    -------
    ndarray, shape (H, W, 4)
        The RGBA picture written.

    Raises
    ------
    InputError
        Bad folder, junction or file name, or an existing file without ``overwrite``.
    """
    size = _checked_size(size)
    out = tables.check_new_file(path, suffix=".png", overwrite=overwrite)
    viewer, panel = open_result(outdir, mask_path=mask_path, colour_by=colour_by, show=False)
    try:
        _realise_hidden(viewer, size)
        viewer.reset_view()
        panel._base_zoom = float(_camera(viewer).zoom)
        if bifurcation is not None:
            panel.goto(bifurcation)
        img = np.asarray(viewer.screenshot(canvas_only=True, size=tuple(size)))
    finally:
        viewer.close()
    _write_png(out, img)
    return img


def _checked_size(size):
    """``(height, width)`` in pixels, each a whole number from 64 to 8192."""
    try:
        h, w = (int(v) for v in size)
        ok = all(float(v) == int(v) for v in size) and all(_MIN_PIXELS <= v <= _MAX_PIXELS for v in (h, w))
    except (TypeError, ValueError):
        ok = False
    if not ok:
        raise InputError(f"expected (height, width) in whole pixels from {_MIN_PIXELS} to {_MAX_PIXELS}, got "
                         f"{size!r}", param="size")
    return h, w


def _write_png(path: Path, img: np.ndarray):
    from PIL import Image

    path.parent.mkdir(parents=True, exist_ok=True)
    tables.write_atomic(path, lambda tmp: Image.fromarray(np.ascontiguousarray(img)).save(tmp, format="PNG"))

"""The review panel: the flagged junctions in a sortable table, their measures and the decision buttons.

In: a napari viewer showing a result's layers. Out: a dock widget that centres the camera on a
junction, shows its parent and daughters, and saves ``review.csv`` on every decision or note.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pandas as pd
from napari.utils.colormaps import ensure_colormap
from qtpy import QtCore, QtGui, QtWidgets

from .. import review as rv, tables
from ..errors import InputError
from ..review_session import ReviewSession
from .layers import (
    CENTRELINE_COLORMAP, _LOG_MEASURES, _META_KEY, _centreline_vectors, _colours, _flag_colours, read_mask_for,
    result_layers,
)


_RING_SIZE_RADII = 4.0
# Keys of the review (viewer-wide; none of them is a key of napari's points,
# vectors or image layers, so a keystroke never edits a layer instead).
_NEXT_KEY, _PREVIOUS_KEY = "n", "b"
_DECISION_KEYS = {"confirmed": "c", "artefact": "x", "unsure": "u"}
# The parent and daughters of the junction under review: white, wider than
# the other centrelines, each labelled.
_CURRENT_VESSELS_COLOUR = "#ffffff"
# Their labels in a colour of their own, readable on white vessels, the grey
# mask and the black background alike (not in viridis nor a decision colour).
_LABEL_COLOUR = "#00e5ff"
_VIEW_RADII = 8.0
_VIEW_MIN_UM = 40.0


# ---------------------------------------------------------------------------
# napari version differences
# ---------------------------------------------------------------------------

def _camera(viewer):
    # napari 0.9 moved the camera to viewer.scene and deprecated viewer.camera.
    scene = getattr(viewer, "scene", None)
    return scene.camera if scene is not None else viewer.camera


def _text_overlay(viewer):
    return _overlay(viewer, "text")


def _scale_bar(viewer):
    return _overlay(viewer, "scale_bar")


def _overlay(viewer, name):
    # napari 0.9 moved the canvas overlays to viewer.canvas.overlays.
    canvas = getattr(viewer, "canvas", None)
    overlays = getattr(canvas, "overlays", None)
    if overlays is not None and hasattr(overlays, name):
        return getattr(overlays, name)
    return getattr(viewer, f"{name}_overlay" if name == "text" else name)


# ---------------------------------------------------------------------------
# review panel
# ---------------------------------------------------------------------------

class _SortItem(QtWidgets.QTableWidgetItem):
    """Table cell that sorts by a key (numbers as numbers, NaN last) and shows text."""

    def __init__(self, text: str, key):
        super().__init__(text)
        self.key = key
        self.setFlags(self.flags() & ~QtCore.Qt.ItemFlag.ItemIsEditable)

    def __lt__(self, other):
        a, b = self.key, getattr(other, "key", None)
        if isinstance(a, float) and isinstance(b, float):
            if math.isnan(a) or math.isnan(b):
                return not math.isnan(a) and math.isnan(b)
            return a < b
        return str(a) < str(b)


def _num(v) -> float:
    try:
        f = float(v)
    except (TypeError, ValueError):
        return math.nan
    return f


class ReviewPanel(QtWidgets.QWidget):
    """Dock widget: the flagged bifurcations of one result folder and their review.

    A view of a :class:`pipeline.review_session.ReviewSession` (the queue,
    the junction under review, the decisions and their saving), which it
    draws and forwards its buttons to.

    Also the npe2 widget contribution (napari passes ``napari_viewer``); it
    then finds the folder through the layers the vesselflow reader added.

    Parameters
    ----------
    napari_viewer : napari.Viewer
    outdir : path, optional, keyword-only
        The result folder; default: the folder named by layers the vesselflow
        reader added to the viewer (else the panel offers to open one).
    mask_path : path, optional, keyword-only
    colour_by : str, keyword-only
        Initial centreline measure.
    add_layers : bool, keyword-only
        Add the result's layers (False when the reader already did).
    """

    COLUMNS = ReviewSession.COLUMNS

    def __init__(self, napari_viewer, *, outdir=None, mask_path=None, colour_by="radius", add_layers=True):
        super().__init__()
        self.viewer = napari_viewer
        self.session: ReviewSession | None = None
        self.colour_by = colour_by
        self._base_zoom: float | None = None
        self._syncing = False
        self._build()
        if outdir is None:
            outdir = self._folder_from_layers()
            add_layers = outdir is None and add_layers
        if outdir is not None:
            self.load(outdir, mask_path=mask_path, colour_by=colour_by, add_layers=add_layers)

    # the session's state, as the panel shows it
    @property
    def result(self) -> tables.Result | None:
        return None if self.session is None else self.session.result

    @property
    def review(self) -> pd.DataFrame:
        return rv.empty_review() if self.session is None else self.session.review

    @property
    def flagged(self) -> pd.DataFrame:
        return pd.DataFrame() if self.session is None else self.session.queue

    @property
    def current_node(self) -> int | None:
        return None if self.session is None else self.session.current

    # -- widgets -----------------------------------------------------------
    def _build(self):
        lay = QtWidgets.QVBoxLayout(self)
        self.title = QtWidgets.QLabel("No result folder open")
        self.title.setWordWrap(True)
        self.open_button = QtWidgets.QPushButton("Open result folder…")
        self.open_button.clicked.connect(self._choose_folder)
        lay.addWidget(self.title)
        lay.addWidget(self.open_button)

        row = QtWidgets.QHBoxLayout()
        row.addWidget(QtWidgets.QLabel("Colour by"))
        self.colour_box = QtWidgets.QComboBox()
        for key, (label, unit) in rv.COLOUR_MEASURES.items():
            self.colour_box.addItem(f"{label}" + (f" ({unit})" if unit else ""), key)
        self.colour_box.currentIndexChanged.connect(self._colour_changed)
        row.addWidget(self.colour_box, 1)
        lay.addLayout(row)
        legend = QtWidgets.QHBoxLayout()
        self.legend_lo = QtWidgets.QLabel("")
        self.legend_bar = QtWidgets.QLabel()
        self.legend_hi = QtWidgets.QLabel("")
        legend.addWidget(self.legend_lo)
        legend.addWidget(self.legend_bar, 1)
        legend.addWidget(self.legend_hi)
        lay.addLayout(legend)

        self.table = QtWidgets.QTableWidget(0, len(self.COLUMNS))
        self.table.setHorizontalHeaderLabels(list(self.COLUMNS))
        self.table.setSelectionBehavior(QtWidgets.QAbstractItemView.SelectionBehavior.SelectRows)
        self.table.setSelectionMode(QtWidgets.QAbstractItemView.SelectionMode.SingleSelection)
        self.table.verticalHeader().setVisible(False)
        self.table.horizontalHeader().setStretchLastSection(True)
        # The queue opens most severe first; a click on a header re-sorts it.
        self.table.horizontalHeader().setSortIndicator(self.COLUMNS.index("severity"),
                                                       QtCore.Qt.SortOrder.DescendingOrder)
        self.table.setSortingEnabled(True)
        self.table.currentCellChanged.connect(self._row_changed)
        lay.addWidget(self.table, 2)

        nav = QtWidgets.QHBoxLayout()
        self.prev_button = QtWidgets.QPushButton("◀ Previous (B)")
        self.next_button = QtWidgets.QPushButton("Next (N) ▶")
        self.prev_button.clicked.connect(self.previous)
        self.next_button.clicked.connect(self.next)
        self.ndisplay_button = QtWidgets.QPushButton("2-D / 3-D")
        self.ndisplay_button.setToolTip("Switch between a 2-D slice and the 3-D view")
        self.ndisplay_button.clicked.connect(self.toggle_ndisplay)
        nav.addWidget(self.prev_button)
        nav.addWidget(self.next_button)
        nav.addWidget(self.ndisplay_button)
        lay.addLayout(nav)

        self.details = QtWidgets.QLabel("")
        self.details.setWordWrap(True)
        self.details.setTextFormat(QtCore.Qt.TextFormat.RichText)
        self.details.setTextInteractionFlags(QtCore.Qt.TextInteractionFlag.TextSelectableByMouse)
        lay.addWidget(self.details, 1)

        dec = QtWidgets.QHBoxLayout()
        self.decision_buttons = {}
        for d in rv.DECISIONS:
            key = _DECISION_KEYS[d]
            b = QtWidgets.QPushButton(f"{d.capitalize()} ({key.upper()})")
            b.setCheckable(True)
            b.clicked.connect(lambda _checked=False, d=d: self.decide(d))
            dec.addWidget(b)
            self.decision_buttons[d] = b
        self.clear_button = QtWidgets.QPushButton("Clear")
        self.clear_button.clicked.connect(self.clear)
        dec.addWidget(self.clear_button)
        lay.addLayout(dec)
        self.note = QtWidgets.QLineEdit()
        self.note.setPlaceholderText("note (optional; saved with the decision)")
        self.note.editingFinished.connect(self._note_done)
        lay.addWidget(self.note)
        self.status = QtWidgets.QLabel("")
        self.status.setWordWrap(True)
        lay.addWidget(self.status)
        self._enable(False)

    def _enable(self, on: bool):
        for w in (self.prev_button, self.next_button, self.clear_button, self.note, *self.decision_buttons.values()):
            w.setEnabled(on)

    # -- loading -----------------------------------------------------------
    def _folder_from_layers(self):
        for layer in self.viewer.layers:
            path = layer.metadata.get(_META_KEY) if isinstance(layer.metadata, dict) else None
            if path:
                return path
        return None

    def _choose_folder(self):
        path = QtWidgets.QFileDialog.getExistingDirectory(self, "Open a vesselflow result folder")
        if path:
            try:
                self.load(path, add_layers=True)
            except InputError as exc:
                self.status.setText(f"Cannot open: {exc}")

    def load(self, outdir, *, mask_path=None, colour_by=None, add_layers=True):
        """Show the result folder ``outdir`` and its saved review.

        Raises
        ------
        InputError
            If the folder is incomplete, its ``review.csv`` invalid, or the
            mask unreadable.
        """
        session = ReviewSession(outdir)  # checks the review's node ids against this result
        result = session.result
        colour_by = colour_by or self.colour_by
        if colour_by not in rv.available_measures(result):
            rv.segment_measure(result, colour_by)  # raises with the reason
        self.session, self.colour_by = session, colour_by
        if add_layers:
            mask, why = read_mask_for(result, mask_path)
            if why:
                self.status.setText(why)
            for data, kwargs, kind in result_layers(result, mask=mask, colour_by=self.colour_by,
                                                    review=self.review):
                getattr(self.viewer, f"add_{kind}")(data, **kwargs)
        self._layer("flagged bifurcations")
        ring = self._layer("current bifurcation")
        if ring is None:
            self.viewer.add_points(np.zeros((0, 3)), name="current bifurcation", size=1.0,
                                   face_color="transparent", border_color="white", border_width=0.06,
                                   border_width_is_relative=True, blending="translucent_no_depth",
                                   metadata={_META_KEY: str(Path(result.path).resolve())})
        if self._layer("current vessels") is None:
            meta = {_META_KEY: str(Path(result.path).resolve())}
            self.viewer.add_vectors(np.zeros((0, 2, 3)), name="current vessels", edge_color=_CURRENT_VESSELS_COLOUR,
                                    edge_width=1.0, vector_style="line", blending="translucent_no_depth",
                                    metadata=dict(meta))
            self.viewer.add_points(np.zeros((0, 3)), name="current labels", size=0.1, face_color="transparent",
                                   border_width=0, text={"string": "{label}", "color": _LABEL_COLOUR, "size": 12,
                                                         "anchor": "upper_left"},
                                   features=pd.DataFrame({"label": pd.Series([], dtype=str)}),
                                   blending="translucent_no_depth", metadata=dict(meta))
        for name in ("flagged bifurcations", "current bifurcation", "nodes", "current labels"):
            layer = self._layer(name)
            if layer is not None:
                layer.editable = False  # a stray keystroke must not move or delete a marker
        self.viewer.layers.selection.active = self._layer("flagged bifurcations")
        self._bind_keys()
        self._show_scale_bar()
        available = rv.available_measures(result)
        model = self.colour_box.model()
        for i in range(self.colour_box.count()):
            model.item(i).setEnabled(self.colour_box.itemData(i) in available)
        self._syncing = True
        self.colour_box.setCurrentIndex(self.colour_box.findData(self.colour_by))
        self._syncing = False
        self._recolour()
        self.open_button.setVisible(False)
        self._fill_table()
        self._update_title()
        self._enable(len(self.flagged) > 0)
        self.viewer.reset_view()
        self._base_zoom = float(_camera(self.viewer).zoom)

    def _bind_keys(self):
        """The review's keys on the viewer: N next, B back, C / X / U a decision."""
        bindings = [(_NEXT_KEY, self.next), (_PREVIOUS_KEY, self.previous)]
        bindings += [(key, lambda d=d: self.decide(d)) for d, key in _DECISION_KEYS.items()]
        for key, action in bindings:
            self.viewer.bind_key(key, lambda _viewer, f=action: f(), overwrite=True)

    def _show_scale_bar(self):
        """A scale bar in µm, the unit of the world frame."""
        bar = _scale_bar(self.viewer)
        bar.visible = True
        layers = [layer for layer in self.viewer.layers if _META_KEY in layer.metadata]
        if layers and hasattr(layers[0], "units"):
            # napari 0.6 and later take the unit from the layers
            for layer in layers:
                layer.units = ("um",) * layer.ndim
        else:
            bar.unit = "um"

    def toggle_ndisplay(self):
        """Switch the canvas between 2-D and 3-D, staying on the junction under review."""
        dims = self.viewer.dims
        dims.ndisplay = 2 if dims.ndisplay == 3 else 3
        if self.current_node is not None:
            self.goto(self.current_node)

    def _layer(self, name):
        for layer in self.viewer.layers:
            if layer.name == name:
                return layer
        return None

    # -- table -------------------------------------------------------------
    def _fill_table(self):
        self._syncing = True
        self.table.setSortingEnabled(False)
        rows = self.session.rows()
        self.table.setRowCount(len(rows))
        for r, row in enumerate(rows):
            cells = [_SortItem(*row[name]) for name in self.COLUMNS]
            cells[0].setData(QtCore.Qt.ItemDataRole.UserRole, int(row["node"][1]))
            for c, item in enumerate(cells):
                self.table.setItem(r, c, item)
        self.table.setSortingEnabled(True)
        self.table.resizeColumnsToContents()
        self._syncing = False

    def table_rows(self) -> list[dict]:
        """The table as shown (current sort order): one dict per row, by column name."""
        out = []
        for r in range(self.table.rowCount()):
            out.append({name: self.table.item(r, c).text() for c, name in enumerate(self.COLUMNS)})
        return out

    def _row_of(self, node_id):
        for r in range(self.table.rowCount()):
            if self.table.item(r, 0).data(QtCore.Qt.ItemDataRole.UserRole) == int(node_id):
                return r
        return None

    def _row_changed(self, row, _col, _prev_row, _prev_col):
        if self._syncing or row < 0:
            return
        node = self.table.item(row, 0).data(QtCore.Qt.ItemDataRole.UserRole)
        if node != self.current_node:
            self.goto(node)

    def _update_title(self):
        c = self.session.counts()
        self.title.setText(f"<b>{Path(self.result.path).name}</b>: {c['flagged']} flagged of "
                           f"{c['bifurcations']} bifurcations; reviewed {c['reviewed']} "
                           f"({c['confirmed']} confirmed, {c['artefact']} artefact, {c['unsure']} unsure)")

    # -- navigation --------------------------------------------------------
    def goto(self, node_id):
        """Centre and zoom the camera on junction ``node_id`` and show its measures.

        Raises
        ------
        InputError
            If ``node_id`` is not a junction of the result.
        """
        row = self.session.go(node_id)
        pos = tuple(float(row[c]) for c in ("z_um", "y_um", "x_um"))
        r0 = _num(row["radius_parent_um"])
        r0 = r0 if math.isfinite(r0) and r0 > 0 else 2.0
        cam = _camera(self.viewer)
        for axis, value in enumerate(pos):
            if axis < self.viewer.dims.ndim:
                self.viewer.dims.set_point(axis, value)
        window = max(_VIEW_RADII * r0, _VIEW_MIN_UM)
        extent = np.asarray(self.viewer.layers.extent.world, dtype=float)
        shown = list(self.viewer.dims.displayed)
        size = float(np.max(extent[1, shown] - extent[0, shown])) if extent.size else window
        base = self._base_zoom or float(cam.zoom)
        cam.center = pos if self.viewer.dims.ndisplay == 3 else pos[1:]
        cam.zoom = base * max(size / window, 1.0)
        ring = self._layer("current bifurcation")
        if ring is not None:
            ring.data = np.asarray([pos])
            ring.size = np.asarray([_RING_SIZE_RADII * r0])
        self._show_vessels(row)
        r = self._row_of(node_id)
        self._syncing = True
        if r is not None:
            self.table.selectRow(r)
            self.table.setCurrentCell(r, 0)
            self.table.scrollToItem(self.table.item(r, 0))
        else:
            self.table.clearSelection()
        self._syncing = False
        decision, note = self.session.decision_of(node_id)
        for d, btn in self.decision_buttons.items():
            btn.setChecked(d == decision)
        self.note.setText(note)
        self._enable(True)
        lines = self.session.details(node_id)
        self.details.setText("<br>".join([f"<b>{lines[0]}</b>"] + lines[1:]))
        self._update_overlay()

    def _show_vessels(self, row):
        """Draw the parent and daughters of a junction over the other centrelines, each labelled."""
        segs = self.result.segments
        index = {int(s): i for i, s in enumerate(segs["segment_id"].to_numpy(np.int64))}
        daughters = [int(x) for x in str(row.get("daughter_segments", "")).split(";") if x.strip().isdigit()]
        roles = [("parent", int(row["parent_segment"]))] + [(f"daughter {k + 1}", d) for k, d in enumerate(daughters)]
        vectors, points, labels = [], [], []
        for label, sid in roles:
            if sid not in index:
                continue
            p = np.asarray(self.result.centrelines[index[sid]], dtype=float)
            if len(p) < 2:
                continue
            vectors.append(np.stack([p[:-1], np.diff(p, axis=0)], axis=1))
            # the label two thirds of the way out from the junction, where the vessels have parted
            near_start = np.linalg.norm(p[0] - np.asarray([row["z_um"], row["y_um"], row["x_um"]], float)) <= \
                np.linalg.norm(p[-1] - np.asarray([row["z_um"], row["y_um"], row["x_um"]], float))
            k = (2 * (len(p) - 1)) // 3
            points.append(p[k] if near_start else p[len(p) - 1 - k])
            labels.append(label)
        lines = self._layer("current vessels")
        if lines is not None:
            r = segs["radius_um"].to_numpy(float)
            lines.edge_width = float(np.clip(0.6 * np.nanmedian(r), 0.8, 6.0)) if r.size else 1.0
            lines.data = np.concatenate(vectors) if vectors else np.zeros((0, 2, 3))
        tags = self._layer("current labels")
        if tags is not None:
            tags.data = np.asarray(points) if points else np.zeros((0, 3))
            tags.features = pd.DataFrame({"label": labels})
            tags.text.refresh(tags.features)

    def _update_overlay(self):
        """The canvas text: the colour legend, and the junction under review with its node id."""
        overlay = _text_overlay(self.viewer)
        text = getattr(self, "_legend_text", "")
        if self.current_node is not None:
            c = self.session.counts()
            text = f"junction {self.current_node} (node id); reviewed {c['reviewed']} of {c['flagged']}\n" + text
        overlay.text = text
        overlay.visible = True

    def _order(self) -> list[int]:
        return [self.table.item(r, 0).data(QtCore.Qt.ItemDataRole.UserRole) for r in range(self.table.rowCount())]

    def next(self):
        """Go to the next flagged junction in the table's order (wraps round)."""
        self._step(+1)

    def previous(self):
        """Go to the previous flagged junction in the table's order (wraps round)."""
        self._step(-1)

    def _step(self, k):
        node = self.session.step(k, self._order()) if self.session is not None else None
        if node is not None:
            self.goto(node)

    # -- decisions ---------------------------------------------------------
    def decide(self, decision, note=None):
        """Record ``decision`` for the current junction and save ``review.csv``."""
        if self.current_node is None:
            return
        path = self.session.decide(decision, self.note.text() if note is None else note)
        self._saved(path)

    def clear(self):
        """Remove the current junction's decision and save ``review.csv``."""
        if self.current_node is None:
            return
        path = self.session.clear()
        self.note.clear()
        self._saved(path)

    def set_note(self, text):
        """Set the current junction's note (saved at once if it has a decision)."""
        self.note.setText(text)
        self._note_done()

    def _note_done(self):
        if self.current_node is None:
            return
        decision, _ = self.session.decision_of(self.current_node)
        if not decision:
            if self.note.text():
                self.status.setText("Choose a decision to save the note.")
            return
        path = self.session.set_note(self.note.text())
        if path is not None:
            self._saved(path)

    def _saved(self, path):
        node = self.current_node
        decision, _ = self.session.decision_of(node)
        for d, btn in self.decision_buttons.items():
            btn.setChecked(d == decision)
        self._fill_table()
        self.goto(node)
        self._update_title()
        layer = self._layer("flagged bifurcations")
        if layer is not None and len(self.flagged):
            layer.border_color = _flag_colours(self.flagged["node_id"], self.session.decisions())
        self.status.setText(f"Saved {path.name} ({len(self.review)} decisions).")

    # -- colour ------------------------------------------------------------
    def _colour_changed(self, index):
        if self._syncing or self.result is None:
            return
        self.set_colour_by(self.colour_box.itemData(index))

    def set_colour_by(self, measure):
        """Colour the centrelines by ``measure`` (a key of :data:`pipeline.review.COLOUR_MEASURES`)."""
        rv.segment_measure(self.result, measure)  # raises for an unavailable measure
        self.colour_by = measure
        self._syncing = True
        self.colour_box.setCurrentIndex(self.colour_box.findData(measure))
        self._syncing = False
        self._recolour()

    def _recolour(self):
        values = rv.segment_measure(self.result, self.colour_by)
        rgba, (lo, hi) = _colours(values, measure=self.colour_by)
        layer = self._layer("centrelines")
        if layer is not None and len(layer.data):
            _, owner = _centreline_vectors(self.result)
            layer.edge_color = rgba[owner]
            layer.metadata["colour_by"] = self.colour_by
        label, unit = rv.COLOUR_MEASURES[self.colour_by]
        unit_text = f" {unit}" if unit else ""
        self.legend_lo.setText(f"{lo:.3g}")
        self.legend_hi.setText(f"{hi:.3g}{unit_text}")
        grad = np.asarray(ensure_colormap(CENTRELINE_COLORMAP).map(np.linspace(0, 1, 256)), dtype=float)
        img = np.ascontiguousarray(np.repeat((grad[None, :, :3] * 255).astype(np.uint8), 12, axis=0))
        qimg = QtGui.QImage(img.data, img.shape[1], img.shape[0], 3 * img.shape[1],
                            QtGui.QImage.Format.Format_RGB888).copy()
        self.legend_bar.setPixmap(QtGui.QPixmap.fromImage(qimg).scaled(
            160, 12, QtCore.Qt.AspectRatioMode.IgnoreAspectRatio))
        self.legend_bar.setToolTip(f"{label}{unit_text}, {CENTRELINE_COLORMAP}; grey: no value")
        scale = ", log scale" if self.colour_by in _LOG_MEASURES else ""
        # Short lines: one long line is cut off on a screenshot-sized canvas.
        self._legend_text = (f"centrelines: {label}{(' [' + unit + ']') if unit else ''}{scale}\n"
                             f"{lo:.3g} (purple) to {hi:.3g} (yellow), grey: none\n"
                             "flagged junctions: magenta rings; white: parent and daughters")
        self._update_overlay()

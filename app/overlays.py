"""Items drawn over the map: compass, disk geometry, slits, resonances.

Each overlay draws what the controller holds and turns the user's mouse work
into calls on the controller; none of them keeps state of its own beyond
what is needed to draw.
"""

from __future__ import annotations

import math
from typing import Callable

import numpy as np
import pyqtgraph as pg
from PySide6.QtCore import QPointF, QRectF, Qt, Signal
from PySide6.QtGui import QColor, QPainterPath, QPen

from .skyframe import SkyFrame

__all__ = ["Compass", "GeometryOverlay", "SlitItem", "SlitLayer",
           "ResonanceLayer", "PALETTE"]

#: Our colours for overlays (chosen to read on both colour maps).
PALETTE = {
    "slit": QColor(250, 250, 250),
    "slit_selected": QColor(255, 196, 0),
    "slit_unused": QColor(160, 160, 160),
    "nodes": QColor(40, 220, 200),
    "centre": QColor(40, 220, 200),
    "ellipse": QColor(40, 220, 200, 170),
    "compass": QColor(235, 235, 235),
    "CR": QColor(255, 120, 60),
    "ILR": QColor(120, 200, 255),
    "OLR": QColor(120, 200, 255),
    "UHR": QColor(190, 150, 255),
    "bar": QColor(255, 80, 160),
}


def _pen(color: QColor, width: float = 1.5, style=Qt.PenStyle.SolidLine) -> QPen:
    pen = QPen(color)
    pen.setWidthF(width)
    pen.setCosmetic(True)
    pen.setStyle(style)
    return pen


class Compass:
    """North and east arrows in a corner of the map (dark outline, light fill)."""

    def __init__(self, plot: pg.PlotItem) -> None:
        self._plot = plot
        self._shadows = [pg.PlotCurveItem(pen=_pen(QColor(20, 20, 20), 4.5))
                         for _ in range(2)]
        self._lines = [pg.PlotCurveItem(pen=_pen(PALETTE["compass"], 2.0))
                       for _ in range(2)]
        self._labels = [pg.TextItem(text, color=PALETTE["compass"], anchor=(0.5, 0.5),
                                    fill=pg.mkBrush(20, 20, 20, 200))
                        for text in ("N", "E")]
        for z, item in enumerate(self._shadows + self._lines + self._labels):
            item.setZValue(20 + z)
            plot.addItem(item)

    def update(self, frame: SkyFrame | None, shape: tuple[int, int]) -> None:
        visible = frame is not None
        for item in self._shadows + self._lines + self._labels:
            item.setVisible(visible)
        if not visible:
            return
        ny, nx = shape
        size = 0.12 * min(nx, ny)
        base = np.array([nx - 1 - 0.06 * nx - size, 0.06 * ny + size])
        for shadow, line, label, (e, n) in zip(self._shadows, self._lines, self._labels,
                                               ((0.0, 1.0), (1.0, 0.0))):
            d = frame.direction_pixel(e, n) * size
            tip = base + d
            side = np.array([-d[1], d[0]]) * 0.25
            head1 = tip - 0.3 * d + side
            head2 = tip - 0.3 * d - side
            xs = [base[0], tip[0], head1[0], tip[0], head2[0]]
            ys = [base[1], tip[1], head1[1], tip[1], head2[1]]
            shadow.setData(xs, ys)
            line.setData(xs, ys)
            pos = base + 1.35 * d
            label.setPos(float(pos[0]), float(pos[1]))


class GeometryOverlay:
    """Centre, line of nodes and inclination ellipse, with drag handles.

    Dragging the centre marker moves the centre; dragging the handle at the
    receding end of the line of nodes turns the position angle; dragging the
    handle on the minor axis changes the inclination (its distance from the
    centre is ``a cos i``). The edit is sent when the drag ends.
    """

    def __init__(self, plot: pg.PlotItem,
                 on_edit: Callable[[str, dict], None]) -> None:
        self._plot = plot
        self._on_edit = on_edit
        self._frame: SkyFrame | None = None
        self._geometry = None
        self._wcs = None
        self.radius_arcsec = 1.0
        self.nodes = pg.PlotCurveItem(pen=_pen(PALETTE["nodes"], 1.5, Qt.PenStyle.DashLine))
        self.ellipse = pg.PlotCurveItem(pen=_pen(PALETTE["ellipse"], 1.2))
        self.centre = pg.TargetItem(size=14, symbol="+", movable=True,
                                    pen=_pen(PALETTE["centre"], 2.0))
        self.pa_handle = pg.TargetItem(size=11, symbol="o", movable=True,
                                       pen=_pen(PALETTE["nodes"], 2.0),
                                       brush=pg.mkBrush(PALETTE["nodes"]))
        self.inc_handle = pg.TargetItem(size=10, symbol="s", movable=True,
                                        pen=_pen(PALETTE["ellipse"], 2.0))
        self.receding = pg.TextItem("receding", color=(245, 245, 245), anchor=(0, 1),
                                    fill=pg.mkBrush(20, 20, 20, 200),
                                    border=pg.mkPen(PALETTE["nodes"]))
        self.centre.setToolTip("Disk centre: drag to move it")
        self.pa_handle.setToolTip("Receding end of the line of nodes: drag to "
                                  "turn the position angle (turns every slit)")
        self.inc_handle.setToolTip("Minor-axis handle of the inclination ellipse: "
                                   "drag towards the centre for a more inclined disk")
        for z, item in enumerate((self.ellipse, self.nodes, self.receding,
                                  self.inc_handle, self.pa_handle, self.centre)):
            item.setZValue(30 + z)
            plot.addItem(item)
        self.centre.sigPositionChanged.connect(self._preview)
        self.pa_handle.sigPositionChanged.connect(self._preview)
        self.inc_handle.sigPositionChanged.connect(self._preview)
        self.centre.sigPositionChangeFinished.connect(self._centre_done)
        self.pa_handle.sigPositionChangeFinished.connect(self._pa_done)
        self.inc_handle.sigPositionChangeFinished.connect(self._inc_done)
        self._updating = False
        self.set_visible(False)

    def set_visible(self, visible: bool) -> None:
        for item in (self.nodes, self.ellipse, self.centre, self.pa_handle,
                     self.inc_handle, self.receding):
            item.setVisible(visible)

    def update(self, frame: SkyFrame | None, geometry, wcs, shape) -> None:
        self._frame, self._geometry, self._wcs = frame, geometry, wcs
        if frame is None or geometry is None:
            self.set_visible(False)
            return
        self.radius_arcsec = 0.4 * min(shape) * frame.pixel_scale_arcsec
        self.set_visible(True)
        self._draw(frame)

    def _draw(self, frame: SkyFrame) -> None:
        a = self.radius_arcsec
        self._updating = True
        try:
            x, y = frame.lon_to_pixel(np.array([-1.15 * a, 1.15 * a]), np.zeros(2))
            self.nodes.setData(x, y)
            ex, ey = frame.disk_circle(a)
            self.ellipse.setData(ex, ey)
            self.centre.setPos(*map(float, frame.origin_pix))
            px, py = frame.lon_to_pixel(a, 0.0)
            self.pa_handle.setPos(float(px), float(py))
            self.receding.setPos(float(px), float(py))
            qx, qy = frame.lon_to_pixel(0.0, a * math.cos(math.radians(frame.inc_deg)))
            self.inc_handle.setPos(float(qx), float(qy))
        finally:
            self._updating = False

    def _preview(self, handle=None) -> None:
        """Redraw while a handle is dragged (no recompute yet)."""
        if self._updating or self._frame is None:
            return
        frame = self._frame
        c = self.centre.pos()
        origin = np.array([c.x(), c.y()])
        pa, inc = frame.pa_deg, frame.inc_deg
        if handle is self.pa_handle:
            pa = self._pa_from_handle()
        elif handle is self.inc_handle:
            inc = self._inc_from_handle()
        preview = SkyFrame(origin, frame.matrix, pa, inc, frame.pixel_scale_arcsec)
        self._draw_lines_only(preview)

    def _draw_lines_only(self, frame: SkyFrame) -> None:
        a = self.radius_arcsec
        x, y = frame.lon_to_pixel(np.array([-1.15 * a, 1.15 * a]), np.zeros(2))
        self.nodes.setData(x, y)
        ex, ey = frame.disk_circle(a)
        self.ellipse.setData(ex, ey)

    def _handle_offsets(self, handle) -> tuple[float, float]:
        c, p = self.centre.pos(), handle.pos()
        inv = np.linalg.inv(self._frame.matrix)
        d = inv @ np.array([p.x() - c.x(), p.y() - c.y()])
        return float(d[0]), float(d[1])

    def _pa_from_handle(self) -> float:
        east, north = self._handle_offsets(self.pa_handle)
        return math.degrees(math.atan2(east, north)) % 360.0

    def _inc_from_handle(self) -> float:
        east, north = self._handle_offsets(self.inc_handle)
        ratio = min(max(math.hypot(east, north) / self.radius_arcsec, 0.035), 0.995)
        return math.degrees(math.acos(ratio))

    def _centre_done(self) -> None:
        if self._updating or self._wcs is None:
            return
        p = self.centre.pos()
        world = self._wcs.celestial.pixel_to_world(p.x(), p.y()).icrs
        self._on_edit("move centre", dict(ra_deg=float(world.ra.deg),
                                          dec_deg=float(world.dec.deg)))

    def _pa_done(self) -> None:
        if not self._updating and self._frame is not None:
            self._on_edit("turn line of nodes", dict(pa_deg=round(self._pa_from_handle(), 2)))

    def _inc_done(self) -> None:
        if not self._updating and self._frame is not None:
            self._on_edit("change inclination", dict(inc_deg=round(self._inc_from_handle(), 2)))


class SlitItem(pg.GraphicsObject):
    """One slit drawn as its sky outline; drag it across the line of nodes.

    The drag is constrained: the slit stays parallel to the line of nodes
    and only its offset ``Y`` changes. ``sigRegionChanged`` fires on every
    mouse move and ``sigRegionChangeFinished`` when the button is released,
    as for pyqtgraph's ROIs.
    """

    sigRegionChanged = Signal(object)
    sigRegionChangeFinished = Signal(object)
    sigClicked = Signal(object)

    def __init__(self, index: int, layer: "SlitLayer") -> None:
        super().__init__()
        self.index = index
        self._layer = layer
        self._path = QPainterPath()
        self._shape = QPainterPath()
        self._pen = _pen(PALETTE["slit"], 1.3)
        self._drag_start: tuple[QPointF, object] | None = None
        self.slit = None
        self.selected = False
        self.setAcceptHoverEvents(True)
        self.setZValue(40)
        self.setToolTip("Slit: drag across the line of nodes, click to select, "
                        "arrow keys nudge the selected slit")

    def set_outline(self, xs, ys, slit, pen: QPen) -> None:
        self.prepareGeometryChange()
        self.slit = slit
        self._pen = pen
        path = QPainterPath(QPointF(float(xs[0]), float(ys[0])))
        for x, y in zip(xs[1:], ys[1:]):
            path.lineTo(float(x), float(y))
        path.closeSubpath()
        self._path = path
        self._shape = path
        self.update()

    # -- QGraphicsItem ---------------------------------------------------
    def boundingRect(self) -> QRectF:
        return self._path.boundingRect().adjusted(-1, -1, 1, 1)

    def shape(self) -> QPainterPath:
        return self._shape

    def paint(self, painter, *args) -> None:
        painter.setPen(self._pen)
        if self.selected:
            fill = QColor(self._pen.color())
            fill.setAlpha(50)
            painter.setBrush(fill)
        painter.drawPath(self._path)

    def hoverEnterEvent(self, ev) -> None:
        self.setCursor(Qt.CursorShape.SizeAllCursor)

    def hoverLeaveEvent(self, ev) -> None:
        self.unsetCursor()

    def mouseClickEvent(self, ev) -> None:
        if ev.button() == Qt.MouseButton.LeftButton:
            ev.accept()
            self.sigClicked.emit(self)

    def mouseDragEvent(self, ev) -> None:
        if ev.button() != Qt.MouseButton.LeftButton:
            ev.ignore()
            return
        ev.accept()
        if ev.isStart():
            self._drag_start = (ev.buttonDownPos(), self.slit)
        if self._drag_start is None:
            return
        start_pos, _ = self._drag_start
        d = ev.pos() - start_pos
        self.drag_by(d.x(), d.y(), finish=ev.isFinish())

    # -- dragging, also used by tests and the keyboard ------------------
    def drag_by(self, dx_pix: float, dy_pix: float, finish: bool = False) -> None:
        """Move the slit by a pixel displacement since the drag began.

        Only the component across the line of nodes is kept.
        """
        if self._drag_start is None:
            self._drag_start = (QPointF(0, 0), self.slit)
        _, slit0 = self._drag_start
        new = self._layer.shifted_slit(slit0, dx_pix, dy_pix)
        self._layer.report_move(self.index, new, finish)
        if finish:
            self._drag_start = None
            self.sigRegionChangeFinished.emit(self)
        else:
            self.sigRegionChanged.emit(self)


class SlitLayer:
    """All slits of the current set, kept in step with the controller."""

    def __init__(self, plot: pg.PlotItem,
                 on_move: Callable[[int, object, bool], None],
                 on_select: Callable[[int], None]) -> None:
        self._plot = plot
        self._on_move = on_move
        self._on_select = on_select
        self.items: list[SlitItem] = []
        self._frame: SkyFrame | None = None
        self._slits = None
        self._selected = -1
        self._used = None
        self._labels: list[pg.TextItem] = []

    def shifted_slit(self, slit, dx_pix: float, dy_pix: float):
        d_east, d_north = self._frame.delta_to_offsets(dx_pix, dy_pix)
        pa = math.radians(self._frame.pa_deg)
        d_Y = d_east * math.cos(pa) - d_north * math.sin(pa)
        return slit.with_(offset_arcsec=round(slit.offset_arcsec + d_Y, 4))

    def report_move(self, index: int, slit, finish: bool) -> None:
        self._on_move(index, slit, finish)

    def update(self, frame: SkyFrame | None, slits, selected: int, used=None) -> None:
        self._frame, self._slits, self._selected = frame, slits, selected
        if used is not None:
            self._used = used
        n = 0 if (frame is None or slits is None) else len(slits)
        while len(self.items) < n:
            item = SlitItem(len(self.items), self)
            item.sigClicked.connect(lambda it: self._on_select(it.index))
            self._plot.addItem(item)
            label = pg.TextItem("", color=PALETTE["slit"], anchor=(0.5, 0.5),
                                fill=pg.mkBrush(20, 20, 20, 150))
            label.setZValue(41)
            self._plot.addItem(label)
            self.items.append(item)
            self._labels.append(label)
        while len(self.items) > n:
            self._plot.removeItem(self.items.pop())
            self._plot.removeItem(self._labels.pop())
        for i in range(n):
            self._draw(i)

    def update_one(self, index: int, slits) -> None:
        self._slits = slits
        if 0 <= index < len(self.items):
            self._draw(index)

    def set_used(self, used) -> None:
        used = None if used is None else np.asarray(used, dtype=bool)
        same = (used is None and self._used is None) or (
            used is not None and self._used is not None
            and used.shape == self._used.shape and bool((used == self._used).all()))
        self._used = used
        if not same:
            for i in range(len(self.items)):
                self._draw(i)

    def set_selected(self, selected: int) -> None:
        if self._frame is None or self._slits is None:
            self._selected = selected
            return
        self._selected = selected
        for i in range(len(self.items)):
            self._draw(i)

    def _draw(self, i: int) -> None:
        slit = self._slits.slits[i]
        xs, ys = self._frame.slit_outline(slit)
        n = len(self._slits)
        if i == self._selected:
            pen = _pen(PALETTE["slit_selected"], 2.2)
        elif self._used is not None and i < len(self._used) and not self._used[i]:
            pen = _pen(PALETTE["slit_unused"], 1.0, Qt.PenStyle.DotLine)
        else:
            pen = _pen(PALETTE["slit"], 1.0)
        self.items[i].selected = i == self._selected
        self.items[i].setZValue(42 if i == self._selected else 40)
        self.items[i].set_outline(xs, ys, slit, pen)
        # numbers at the receding end; with many slits only every fifth,
        # the ends and the selected one, so they stay readable
        shown = n <= 9 or i in (0, n - 1, self._selected) or (i + 1) % 5 == 0
        label = self._labels[i]
        label.setVisible(shown)
        if shown:
            lx, ly = self._frame.lon_to_pixel(
                slit.x_center_arcsec + slit.half_length_arcsec + 1.5 * self._frame.pixel_scale_arcsec
                * 3, slit.offset_arcsec)
            label.setText(str(i + 1))
            label.setColor(pen.color())
            label.setPos(float(lx), float(ly))


class ResonanceLayer:
    """Resonance radii drawn as deprojected circles (ellipses on the sky)."""

    def __init__(self, plot: pg.PlotItem) -> None:
        self._plot = plot
        self._items: list = []

    def update(self, frame: SkyFrame | None, radii: list[tuple[str, float]]) -> None:
        for item in self._items:
            self._plot.removeItem(item)
        self._items = []
        if frame is None:
            return
        for name, radius in radii:
            if radius is None or not np.isfinite(radius) or radius <= 0:
                continue
            key = next((k for k in PALETTE if name.upper().endswith(k) or
                        name.upper().startswith(k)), "CR")
            color = PALETTE.get(key, PALETTE["CR"])
            x, y = frame.disk_circle(radius)
            curve = pg.PlotCurveItem(x, y, pen=_pen(color, 1.4, Qt.PenStyle.DashDotLine))
            curve.setZValue(25)
            label = pg.TextItem(name, color=color, anchor=(0.5, 1.0))
            lx, ly = frame.lon_to_pixel(0.0, -radius * math.cos(math.radians(frame.inc_deg)))
            label.setPos(float(lx), float(ly))
            label.setZValue(25)
            for item in (curve, label):
                self._plot.addItem(item)
                self._items.append(item)

    @property
    def count(self) -> int:
        return len(self._items) // 2

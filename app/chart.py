"""A small line chart of photos labelled against actions spent, drawn with QPainter."""
from __future__ import annotations

from PySide6.QtCore import QPointF, QRectF, QSize, Qt
from PySide6.QtGui import QColor, QFontMetrics, QPainter, QPainterPath, QPen
from PySide6.QtWidgets import QSizePolicy, QWidget

from app import theme


class LabelledChart(QWidget):
    def __init__(self, parent=None):
        super().__init__(parent)
        self.points: list[tuple[int, int]] = [(0, 0)]
        self.total = 0
        self.setMinimumHeight(110)
        self.setSizePolicy(QSizePolicy.Policy.Expanding, QSizePolicy.Policy.Fixed)
        self.setAccessibleName("Photos labelled against actions")

    def sizeHint(self):
        return QSize(240, 130)

    def set_points(self, points: list[tuple[int, int]], total: int) -> None:
        self.points = points or [(0, 0)]
        self.total = total
        self.setToolTip(f"{self.points[-1][1]} photos labelled after {self.points[-1][0]} actions")
        self.update()

    def paintEvent(self, event):
        p = QPainter(self)
        p.setRenderHint(QPainter.RenderHint.Antialiasing)
        fm = QFontMetrics(self.font())
        left = fm.horizontalAdvance(str(max(self.total, 10))) + 8
        plot = QRectF(left, 6, self.width() - left - 8, self.height() - fm.height() - 14)
        p.fillRect(self.rect(), QColor(theme.SURFACE))
        x_max = max(self.points[-1][0], 1)
        y_max = max(self.total, max(y for _, y in self.points), 1)

        def at(x, y):
            return QPointF(plot.left() + plot.width() * x / x_max, plot.bottom() - plot.height() * y / y_max)

        p.setPen(QPen(QColor(theme.LINE), 1))
        p.drawLine(plot.bottomLeft(), plot.bottomRight())
        p.drawLine(plot.bottomLeft(), plot.topLeft())
        if self.total:  # the ceiling: every photo labelled
            p.setPen(QPen(QColor(theme.LINE), 1, Qt.PenStyle.DashLine))
            p.drawLine(at(0, self.total), at(x_max, self.total))
        p.setPen(QColor(theme.MUTED))
        p.drawText(QRectF(0, plot.top() - 2, left - 4, fm.height()), Qt.AlignmentFlag.AlignRight, str(y_max))
        p.drawText(QRectF(0, plot.bottom() - fm.height(), left - 4, fm.height()), Qt.AlignmentFlag.AlignRight, "0")
        p.drawText(QRectF(plot.left(), plot.bottom() + 3, plot.width(), fm.height()),
                   Qt.AlignmentFlag.AlignLeft, "actions →")
        p.drawText(QRectF(plot.left(), plot.bottom() + 3, plot.width(), fm.height()),
                   Qt.AlignmentFlag.AlignRight, str(x_max))
        path = QPainterPath(at(*self.points[0]))
        for x, y in self.points[1:]:
            path.lineTo(at(x, y))
        p.setPen(QPen(QColor(theme.ACCENT), 2))
        p.drawPath(path)
        p.setBrush(QColor(theme.ACCENT))
        p.drawEllipse(at(*self.points[-1]), 3.5, 3.5)
        p.end()

"""Statistics (Ctrl+Shift+S): photos per label as a bar chart, labels per hour, how often the suggested
label was accepted as it was, per annotator (core/statistics.py has the definitions); "Export CSV…"
writes the same figures as a CSV table."""
from __future__ import annotations

from pathlib import Path

from PySide6.QtCore import QRectF, QSize, Qt
from PySide6.QtGui import QColor, QFontMetrics, QPainter
from PySide6.QtWidgets import (QAbstractItemView, QDialog, QFileDialog, QHBoxLayout, QHeaderView, QLabel,
                               QPushButton, QScrollArea, QSizePolicy, QTableWidget, QTableWidgetItem,
                               QVBoxLayout, QWidget)

from app import theme
from core.statistics import Statistics


class BarChart(QWidget):
    """Horizontal bars, one a row: name on the left, the bar, the count at its end."""

    ROW = 22

    def __init__(self, name: str, parent=None):
        super().__init__(parent)
        self.bars: list[tuple[str, int]] = []
        self.setAccessibleName(name)
        self.setSizePolicy(QSizePolicy.Policy.Expanding, QSizePolicy.Policy.Fixed)

    def set_bars(self, bars: list[tuple[str, int]]) -> None:
        self.bars = list(bars)
        self.setFixedHeight(max(1, len(self.bars)) * self.ROW + 8)
        self.setToolTip("\n".join(f"{name}: {n}" for name, n in self.bars[:40]))
        self.update()

    def sizeHint(self):
        return QSize(420, max(1, len(self.bars)) * self.ROW + 8)

    def paintEvent(self, event):
        p = QPainter(self)
        p.setRenderHint(QPainter.RenderHint.Antialiasing)
        p.fillRect(self.rect(), QColor(theme.SURFACE))
        fm = QFontMetrics(self.font())
        if not self.bars:
            p.setPen(QColor(theme.MUTED))
            p.drawText(self.rect(), Qt.AlignmentFlag.AlignCenter, "nothing labelled yet")
            return
        name_w = min(max(fm.horizontalAdvance(n) for n, _ in self.bars) + 12, self.width() // 3)
        count_w = fm.horizontalAdvance(str(max(n for _, n in self.bars))) + 10
        top = max(n for _, n in self.bars) or 1
        span = max(self.width() - name_w - count_w - 8, 10)
        for i, (name, n) in enumerate(self.bars):
            y = 4 + i * self.ROW
            p.setPen(QColor(theme.INK))
            p.drawText(QRectF(4, y, name_w - 8, self.ROW), Qt.AlignmentFlag.AlignVCenter | Qt.AlignmentFlag.AlignLeft,
                       fm.elidedText(name, Qt.TextElideMode.ElideRight, name_w - 8))
            w = max(2.0, span * n / top)
            p.fillRect(QRectF(name_w, y + 4, w, self.ROW - 8), QColor(theme.ACCENT_BAR))
            p.setPen(QColor(theme.MUTED))
            p.drawText(QRectF(name_w + w + 4, y, count_w, self.ROW),
                       Qt.AlignmentFlag.AlignVCenter | Qt.AlignmentFlag.AlignLeft, str(n))


def _rate(a) -> str:
    return "–" if a.labels_per_hour is None else f"{a.labels_per_hour:.0f}"


def _share(a) -> str:
    return "–" if a.as_suggested_share is None else f"{a.as_suggested_share:.0%} of {a.suggested}"


COLUMNS = ("Annotator", "Actions", "Labels given", "Active hours", "Labels per hour", "Accepted as suggested")


class StatsDialog(QDialog):
    def __init__(self, stats: Statistics, parent=None):
        super().__init__(parent)
        self.stats = stats
        self.written: Path | None = None
        self.setWindowTitle("Statistics")
        self.setMinimumWidth(720)
        labelled = sum(stats.by_label.values())
        self.summary = QLabel(f"{stats.photos} photos, {labelled} labelled under {len(stats.by_label)} "
                              f"label{'s' if len(stats.by_label) != 1 else ''}")
        self.summary.setObjectName("groupHeader")
        self.chart = BarChart("Photos per label")
        self.chart.set_bars(list(stats.by_label.items()))
        scroll = QScrollArea()
        scroll.setWidget(self.chart)
        scroll.setWidgetResizable(True)
        # As tall as the bars (up to 14 rows), scrolling beyond that.
        scroll.setFixedHeight(min(self.chart.sizeHint().height() + 4, 14 * BarChart.ROW + 12))

        rows = stats.annotators + ([stats.total] if len(stats.annotators) > 1 else [])
        self.table = QTableWidget(len(rows), len(COLUMNS))
        self.table.setAccessibleName("Figures per annotator")
        self.table.setHorizontalHeaderLabels(COLUMNS)
        self.table.verticalHeader().hide()
        self.table.setEditTriggers(QAbstractItemView.EditTrigger.NoEditTriggers)
        self.table.horizontalHeader().setSectionResizeMode(QHeaderView.ResizeMode.ResizeToContents)
        self.table.horizontalHeader().setStretchLastSection(True)
        for r, a in enumerate(rows):
            cells = (a.annotator, str(a.actions), str(a.labels_given), f"{a.active_seconds / 3600:.2f}", _rate(a),
                     _share(a))
            for c, text in enumerate(cells):
                item = QTableWidgetItem(text)
                if c:
                    item.setTextAlignment(Qt.AlignmentFlag.AlignRight | Qt.AlignmentFlag.AlignVCenter)
                self.table.setItem(r, c, item)
        self.table.setFixedHeight(self.table.horizontalHeader().height() + 26 * max(1, len(rows)) + 6)

        self.hours = BarChart("Labels given per hour (UTC)")
        self.hours.set_bars([(h.replace("T", " ") + ":00", n) for h, n in stats.per_hour.items()][-12:])
        note = QLabel("Labels given: photos in accepted groups and labelled directly, undone ones left out. "
                      "Active hours count the pauses between decisions up to 5 minutes each. Accepted as "
                      "suggested: groups accepted with the label they suggested and nothing taken out.")
        note.setWordWrap(True)
        note.setObjectName("muted")

        self.export_button = QPushButton("Export CSV…")
        self.export_button.clicked.connect(self.choose_csv)
        self.report = QLabel()
        self.report.setObjectName("muted")
        close = QPushButton("Close")
        close.setDefault(True)
        close.clicked.connect(self.accept)

        def heading(text):
            h = QLabel(text)
            h.setObjectName("heading")
            return h

        lay = QVBoxLayout(self)
        lay.addWidget(self.summary)
        lay.addWidget(heading("Photos per label"))
        lay.addWidget(scroll)
        lay.addWidget(heading("Per annotator"))
        lay.addWidget(self.table)
        lay.addWidget(heading("Labels given per hour (UTC, last 12 hours with work)"))
        lay.addWidget(self.hours)
        lay.addWidget(note)
        lay.addStretch(1)
        buttons = QHBoxLayout()
        buttons.addWidget(self.report, 1)
        buttons.addWidget(self.export_button)
        buttons.addWidget(close)
        lay.addLayout(buttons)

    def choose_csv(self) -> None:
        path, _ = QFileDialog.getSaveFileName(self, "Export statistics", "kinfold-statistics.csv",
                                              "CSV table (*.csv)")
        if path:
            self.export_csv(Path(path))

    def export_csv(self, path: Path) -> None:
        """Write the figures to `path` (the file dialog has already asked before replacing a file)."""
        try:
            self.stats.write_csv(path)
        except OSError as exc:
            self.report.setText(f"⚠  could not write {path.name}: {exc.strerror or exc}")
            return
        self.written = path
        self.report.setText(f"Written: {path}")

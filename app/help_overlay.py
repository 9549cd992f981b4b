"""The shortcut sheet (F1 or ?): drawn over the window from the window's own actions."""
from __future__ import annotations

from PySide6.QtCore import QRectF, Qt
from PySide6.QtGui import QColor, QFont, QFontMetrics, QPainter
from PySide6.QtWidgets import QWidget

from app import theme

# Keys the grid understands without a menu action.
GRID_KEYS = [("Arrow keys", "move between photos, as they are drawn"),
             ("Home End PgUp PgDn", "first, last, a screen up or down"),
             ("Any letter", "start typing a label"),
             ("Tab", "move to the label field"),
             ("Esc", "back from the label field / close a view"),
             ("Click", "take a photo out of the group, or put it back"),
             ("Double-click", "see a photo full size (takes nothing out)")]


class HelpOverlay(QWidget):
    def __init__(self, parent: QWidget, sections):
        """`sections`: [(title, [(keys, what)])]."""
        super().__init__(parent)
        self.sections = sections
        self.setFocusPolicy(Qt.FocusPolicy.StrongFocus)
        self.hide()

    def toggle(self) -> None:
        if self.isVisible():
            self.hide()
            return
        self._before = self.window().focusWidget()
        self.setGeometry(self.parentWidget().rect())
        self.show()
        self.raise_()
        self.setFocus()

    def hideEvent(self, event):
        """Give the keyboard back to the widget that had it. Qt moves the focus off a hidden widget only
        in an active window; in one the window system never made active (an X server without a window
        manager sends keys to the window under the pointer) the hidden sheet kept it and swallowed every
        key after (found driving the real window under Xvfb: F1, Esc, then no key did anything)."""
        super().hideEvent(event)
        if self.window().focusWidget() is not self:
            return
        before = getattr(self, "_before", None)
        try:
            usable = before is not None and before is not self and before.isVisible()
        except RuntimeError:            # the widget was deleted meanwhile
            usable = False
        (before if usable else self.window()).setFocus()

    def keyPressEvent(self, event):
        self.hide()

    def mousePressEvent(self, event):
        self.hide()

    def paintEvent(self, event):
        p = QPainter(self)
        p.setRenderHint(QPainter.RenderHint.Antialiasing)
        p.fillRect(self.rect(), QColor(36, 41, 46, 150))
        font = QFont(self.font())
        fm = QFontMetrics(font)
        line = fm.height() + 6
        bold = QFont(font)
        bold.setBold(True)
        key_w = max([170] + [QFontMetrics(bold).horizontalAdvance(k) + 20 for _, keys in self.sections for k, _ in keys])
        heights = [(len(keys) + 1) * line + 8 for _, keys in self.sections]
        # One column while the sheet fits the window; else two, split where their heights are closest.
        columns = [list(range(len(self.sections)))]
        if 18 + line + 6 + sum(heights) + 12 > self.height() - 40 and len(self.sections) > 1:
            cut = min(range(1, len(heights)), key=lambda c: abs(sum(heights[:c]) - sum(heights[c:])))
            columns = [list(range(cut)), list(range(cut, len(heights)))]
        col_w = 620 if len(columns) == 1 else 560
        width = min(self.width() - 40, col_w * len(columns))
        col_w = width / len(columns)
        body = max(sum(heights[i] for i in col) for col in columns)
        height = min(self.height() - 40, 18 + line + 6 + body + 12)
        card = QRectF((self.width() - width) / 2, (self.height() - height) / 2, width, height)
        p.setPen(QColor(theme.LINE))
        p.setBrush(QColor(theme.SURFACE))
        p.drawRoundedRect(card, 10, 10)
        top = card.top() + 18
        p.setFont(bold)
        p.setPen(QColor(theme.INK))
        p.drawText(QRectF(card.left() + 24, top, width - 48, line), "Keys and mouse — any key closes this sheet")
        top += line + 6
        for c, col in enumerate(columns):
            left, y = card.left() + c * col_w, top
            for i in col:
                title, keys = self.sections[i]
                p.setFont(bold)
                p.setPen(QColor(theme.MUTED))
                p.drawText(QRectF(left + 24, y, col_w - 48, line), title.upper())
                y += line
                for k, what in keys:
                    p.setFont(bold)
                    p.setPen(QColor(theme.ACCENT))
                    p.drawText(QRectF(left + 24, y, key_w, line), k)
                    p.setFont(font)
                    p.setPen(QColor(theme.INK))
                    p.drawText(QRectF(left + 24 + key_w, y, col_w - 48 - key_w, line), what)
                    y += line
                y += 8
        p.end()

"""Kinfold's colours and widget style: warm paper, ink text, one slate-teal accent, rust for problems.
State is never shown by colour alone: marks, badges and words carry it too."""
from __future__ import annotations

PAPER = "#F2EFE8"        # window background
SURFACE = "#FBFAF6"      # panels and cards
LINE = "#D6D1C6"         # borders
INK = "#24292E"          # text
MUTED = "#6A6F73"        # secondary text
ACCENT = "#2D6A66"       # focus, progress, the curve
ACCENT_SOFT = "#D9E8E5"  # selection fill
ACCENT_BAR = "#8DBDB6"   # progress fill: light enough for dark text on top
PROBLEM = "#9C4A2C"      # errors and taken-out badges

STYLE = f"""
QWidget {{ color: {INK}; font-size: 10.5pt; }}
QMainWindow, QDialog, QStackedWidget > QWidget {{ background: {PAPER}; }}
QLabel#title {{ font-size: 20pt; font-weight: 600; }}
QLabel#subtitle, QLabel#muted {{ color: {MUTED}; }}
QLabel#heading {{ font-size: 10pt; font-weight: 600; color: {MUTED}; letter-spacing: 1px;
                 text-transform: uppercase; padding-top: 6px; }}
QLabel#groupHeader {{ font-size: 13pt; font-weight: 600; }}
QLabel#problem {{ color: {PROBLEM}; font-weight: 600; }}
QFrame#panel {{ background: {SURFACE}; border: 1px solid {LINE}; border-radius: 6px; }}
QListView, QListWidget {{ background: {SURFACE}; border: 1px solid {LINE}; border-radius: 6px; }}
QListWidget::item {{ padding: 3px 4px; }}
QListWidget::item:selected {{ background: {ACCENT_SOFT}; color: {INK}; }}
QLineEdit {{ background: white; border: 1px solid {LINE}; border-radius: 4px; padding: 5px 6px; }}
QLineEdit:focus {{ border: 2px solid {ACCENT}; }}
QPushButton, QToolButton {{ background: {SURFACE}; border: 1px solid {LINE}; border-radius: 5px;
                           padding: 5px 12px; }}
QPushButton:hover, QToolButton:hover {{ border-color: {ACCENT}; }}
QPushButton:focus, QToolButton:focus {{ border: 2px solid {ACCENT}; }}
QPushButton:disabled, QToolButton:disabled {{ color: #A4A7A9; }}
QPushButton#primary, QToolButton#primary {{ background: {ACCENT}; color: white; border-color: {ACCENT};
                                           font-weight: 600; }}
QToolButton#primary:disabled, QPushButton#primary:disabled {{ background: #9FB8B5; border-color: #9FB8B5; }}
QProgressBar {{ background: {SURFACE}; border: 1px solid {LINE}; border-radius: 4px; text-align: center;
               min-height: 18px; }}
QProgressBar::chunk {{ background: {ACCENT_BAR}; border-radius: 3px; }}
QStatusBar {{ color: {MUTED}; }}
QSplitter::handle {{ background: {PAPER}; }}
QMenuBar {{ background: {PAPER}; }}
"""

"""A read-only text pane that knows where each token sits: marks tokens, reports the
token under the mouse (hover tooltips, clicks) and scrolls to a token."""

from __future__ import annotations

from typing import Callable, Sequence

import numpy as np
from PySide6.QtCore import QEvent, QPoint, Qt, Signal
from PySide6.QtGui import QColor, QTextCharFormat, QTextCursor, QTextOption
from PySide6.QtWidgets import QPlainTextEdit, QToolTip

from app.style import PALETTE, mono_font
from core.analyses.views import token_at


def _utf16_offsets(text: str) -> np.ndarray | None:
    """Python index -> Qt (UTF-16) position, or None when the two agree (no astral characters)."""
    if text.isascii() or max(text, default="\0") <= "\uffff":  # both in C, no copy of the text
        return None
    astral = np.frombuffer(text.encode("utf-32-le", "surrogatepass"), dtype="<u4") > 0xFFFF
    if not astral.any():
        return None
    return np.concatenate([[0], np.cumsum(astral, dtype=np.int64)]) + np.arange(len(text) + 1)


class TokenText(QPlainTextEdit):
    token_clicked = Signal(int)
    scrolled = Signal()

    def __init__(self, placeholder: str = ""):
        super().__init__()
        self.setReadOnly(True)
        self.setFont(mono_font(9.5))
        self.setWordWrapMode(QTextOption.WrapMode.WrapAtWordBoundaryOrAnywhere)
        self.setPlaceholderText(placeholder)
        self.setTextInteractionFlags(Qt.TextInteractionFlag.TextSelectableByMouse)
        self.document().setDocumentMargin(10)
        self.document().setUndoRedoEnabled(False)
        self._marked_runs: list[tuple[int, int]] = []
        self.marked_count = 0
        self.viewport().setMouseTracking(True)
        self.viewport().installEventFilter(self)
        self.verticalScrollBar().valueChanged.connect(lambda _v: self.scrolled.emit())
        self.spans = np.zeros((0, 2), dtype=np.int64)
        self._map: np.ndarray | None = None
        self.tooltip_for: Callable[[int], str] | None = None
        self._press: QPoint | None = None

    # ---- content -------------------------------------------------------------------------

    def set_content(self, text: str, spans: np.ndarray) -> None:
        self.spans = spans
        self._map = _utf16_offsets(text)
        self._marked_runs = []
        self.marked_count = 0
        self.setPlainText(text)

    def doc_pos(self, index: int) -> int:
        return int(self._map[index]) if self._map is not None else int(index)

    def text_pos(self, position: int) -> int:
        if self._map is None:
            return position
        return int(np.searchsorted(self._map, position, side="right") - 1)

    def _cursor_for(self, token: int) -> QTextCursor:
        a, b = self.spans[token]
        cursor = QTextCursor(self.document())
        cursor.setPosition(self.doc_pos(int(a)))
        cursor.setPosition(self.doc_pos(int(b)), QTextCursor.MoveMode.KeepAnchor)
        return cursor

    def mark(self, tokens: Sequence[int], fmt: QTextCharFormat) -> None:
        """Format the given tokens, and clear the tokens marked before.

        Written into the document rather than as extra selections: thousands of
        ExtraSelection objects corrupt reference counts in some PySide6 versions."""
        tokens = np.asarray(tokens, dtype=np.int64)
        runs: list[tuple[int, int]] = []
        if len(tokens):
            firsts = np.concatenate([[0], np.flatnonzero(np.diff(tokens) != 1) + 1])
            lasts = np.concatenate([firsts[1:] - 1, [len(tokens) - 1]])
            starts, ends = self.spans[tokens[firsts], 0], self.spans[tokens[lasts], 1]
            if self._map is not None:
                starts, ends = self._map[starts], self._map[ends]
            runs = list(zip(starts.tolist(), ends.tolist()))
        cursor = QTextCursor(self.document())
        cursor.beginEditBlock()
        plain = QTextCharFormat()
        for a, b in self._marked_runs:
            cursor.setPosition(a)
            cursor.setPosition(b, QTextCursor.MoveMode.KeepAnchor)
            cursor.setCharFormat(plain)
        for a, b in runs:
            cursor.setPosition(a)
            cursor.setPosition(b, QTextCursor.MoveMode.KeepAnchor)
            cursor.setCharFormat(fmt)
        cursor.endEditBlock()
        self._marked_runs = runs
        self.marked_count = int(len(tokens))

    def paint_levels(self, levels: np.ndarray, formats: dict[int, QTextCharFormat]) -> None:
        """Format every token by its level, in runs of equal level (one pass over the document;
        the runs are found with numpy, so only the formatting itself loops)."""
        levels = np.asarray(levels)
        n = len(levels)
        if n == 0:
            return
        firsts = np.concatenate([[0], np.flatnonzero(levels[1:] != levels[:-1]) + 1])
        lasts = np.concatenate([firsts[1:], [n]]) - 1
        starts, ends = self.spans[firsts, 0], self.spans[lasts, 1]
        if self._map is not None:
            starts, ends = self._map[starts], self._map[ends]
        cursor = QTextCursor(self.document())
        cursor.beginEditBlock()
        for level, a, b in zip(levels[firsts].tolist(), starts.tolist(), ends.tolist()):
            fmt = formats.get(int(level))
            if fmt is not None:
                cursor.setPosition(a)
                cursor.setPosition(b, QTextCursor.MoveMode.KeepAnchor)
                cursor.setCharFormat(fmt)
        cursor.endEditBlock()

    # ---- geometry ------------------------------------------------------------------------

    def token_at_point(self, point: QPoint) -> int | None:
        cursor = self.cursorForPosition(point)
        rect = self.cursorRect(cursor)
        if abs(rect.center().y() - point.y()) > rect.height():
            return None  # below the last line
        pos = self.text_pos(cursor.position())
        # cursorForPosition snaps to the nearest gap; pick the character under the point
        if rect.x() > point.x() and pos > 0:
            pos -= 1
        return token_at(self.spans, pos)

    def visible_tokens(self) -> tuple[int, int]:
        """First and last token index on screen."""
        if len(self.spans) == 0:
            return 0, 0
        top = self.text_pos(self.cursorForPosition(QPoint(0, 0)).position())
        vp = self.viewport().rect()
        bottom = self.text_pos(self.cursorForPosition(QPoint(vp.width() - 1, vp.height() - 1)).position())
        ends = self.spans[:, 1]
        first = int(np.searchsorted(ends, top, side="right"))
        last = int(np.searchsorted(ends, bottom, side="left"))
        n = len(self.spans)
        return min(first, n - 1), min(max(last, first), n - 1)

    def first_visible_token(self) -> int:
        return self.visible_tokens()[0]

    def scroll_to_token(self, token: int, top: bool = True) -> None:
        if not 0 <= token < len(self.spans):
            return
        cursor = QTextCursor(self.document())
        cursor.setPosition(self.doc_pos(int(self.spans[token, 0])))
        if top:
            bar = self.verticalScrollBar()
            block = cursor.block()
            line = block.layout().lineForTextPosition(cursor.position() - block.position())
            # QPlainTextEdit scrolls by lines: count wrapped lines of the blocks before this one
            lines = 0
            b = self.document().firstBlock()
            while b.isValid() and b != block:
                lines += max(1, b.lineCount()) if b.isVisible() else 0
                b = b.next()
            bar.setValue(lines + (line.lineNumber() if line.isValid() else 0))
        else:
            self.setTextCursor(cursor)
            self.ensureCursorVisible()

    # ---- mouse ---------------------------------------------------------------------------

    def eventFilter(self, obj, event) -> bool:  # noqa: N802 (Qt naming)
        if obj is self.viewport():
            kind = event.type()
            if kind == QEvent.Type.ToolTip and self.tooltip_for is not None:
                token = self.token_at_point(event.pos())
                text = self.tooltip_for(token) if token is not None else ""
                if text:
                    QToolTip.showText(event.globalPos(), text, self.viewport())
                else:
                    QToolTip.hideText()
                return True
            if kind == QEvent.Type.MouseButtonPress and event.button() == Qt.MouseButton.LeftButton:
                self._press = event.position().toPoint()
            elif kind == QEvent.Type.MouseButtonRelease and event.button() == Qt.MouseButton.LeftButton:
                if self._press is not None and (event.position().toPoint() - self._press).manhattanLength() < 4:
                    token = self.token_at_point(event.position().toPoint())
                    if token is not None:
                        self.token_clicked.emit(token)
                self._press = None
        return super().eventFilter(obj, event)


def char_format(background: str | QColor | None = None, foreground: str | None = None, underline: str | None = None,
                bold: bool = False) -> QTextCharFormat:
    fmt = QTextCharFormat()
    if background is not None:
        fmt.setBackground(QColor(background))
    if foreground is not None:
        fmt.setForeground(QColor(foreground))
    if underline is not None:
        fmt.setUnderlineStyle(QTextCharFormat.UnderlineStyle.SingleUnderline)
        fmt.setUnderlineColor(QColor(underline))
    if bold:
        fmt.setFontWeight(700)
    return fmt


def wrong_original_format() -> QTextCharFormat:
    return char_format(PALETTE.accent_soft, PALETTE.ink, underline=PALETTE.accent)


def wrong_decoded_format() -> QTextCharFormat:
    return char_format(PALETTE.accent_soft, PALETTE.accent_ink, underline=PALETTE.accent)

"""The text pane over a big text: its document holds a window of tokens, never the whole
text, and what is on screen (characters, failure colours, the token under the mouse) is
still exactly the text's. The reference for every check is the text itself and its spans
(slicing), or token_layout's definition (each token's own characters or its decoded piece)."""

import os

import numpy as np
import pytest
from PySide6.QtCore import QEvent, QPoint, Qt
from PySide6.QtGui import QColor, QHelpEvent, QTextCursor

from app.tokentext import TokenText, char_format, wrong_original_format
from core.analyses.views import DecodedPieces, TextPieces, token_layout

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")

WINDOW = 300  # tokens in a pane's document in these tests (the default is larger)
MARK = "#ffd0d0"


def _text(lines: int = 800):
    """A text of words on lines, with astral characters here and there, and its word spans."""
    rng = np.random.default_rng(3)
    words = ["alpha", "beta", "gamma", "δέλτα", "eps\U0001F600", "zeta", "eta", "theta"]
    parts, spans, at = [], [], 0
    for line in range(lines):
        for w in range(int(rng.integers(3, 9))):
            piece = words[int(rng.integers(len(words)))] + ("\n" if w == 0 and line else " ")
            parts.append(piece)
            spans.append((at, at + len(piece)))
            at += len(piece)
    return "".join(parts), np.asarray(spans, dtype=np.int64)


@pytest.fixture
def pane(qtbot, monkeypatch):
    monkeypatch.setattr(TokenText, "WINDOW_TOKENS", WINDOW)
    widget = TokenText("")
    widget.resize(500, 300)
    qtbot.addWidget(widget)
    widget.show()
    qtbot.waitExposed(widget)
    return widget


def _document_piece(pane: TokenText, token: int) -> str:
    a, b = pane.token_document_range(token)
    cursor = QTextCursor(pane.document())
    cursor.setPosition(a)
    cursor.setPosition(b, QTextCursor.MoveMode.KeepAnchor)
    return cursor.selectedText().replace("\u2029", "\n")  # Qt's paragraph separator is the text's newline


def _background(pane: TokenText, token: int) -> QColor:
    a, _ = pane.token_document_range(token)
    cursor = QTextCursor(pane.document())
    cursor.setPosition(a + 1)  # the format of the character before the cursor: the token's first
    return cursor.charFormat().background().color()


def test_a_big_text_is_never_one_document(pane):
    text, spans = _text()
    assert len(spans) > 10 * WINDOW
    pane.set_content(text, spans)
    assert pane.paged and pane.bar.isVisible()
    assert pane.window_stop - pane.window_start <= WINDOW
    assert pane.document().characterCount() < len(text) / 5
    assert pane.pieces.text is text  # held by reference, not copied
    assert pane.shown_text() == text


def test_after_a_scroll_the_window_shows_the_right_tokens_and_colours(pane, qtbot):
    text, spans = _text()
    pane.set_content(text, spans)
    wrong = np.arange(3, len(spans), 7)
    pane.mark(wrong, char_format(MARK))
    target = len(spans) * 2 // 3
    pane.bar.setValue(target)  # the user drags the pane's own bar
    first, last = pane.visible_tokens()
    assert pane.window_start <= first <= target + 20 and last > first
    assert pane.window_start > 0, "the window moved down the text"
    for token in range(first, last + 1):
        # the reference: the text's own characters at the token's span
        assert _document_piece(pane, token) == text[spans[token, 0]:spans[token, 1]]
        assert (_background(pane, token) == QColor(MARK)) == (token % 7 == 3)
    assert pane.marked_count == len(wrong)


def test_scrolling_the_document_moves_the_window_to_the_end(pane, qtbot):
    text, spans = _text()
    pane.set_content(text, spans)
    firsts = []
    for _ in range(400):
        native = pane.verticalScrollBar()
        native.setValue(native.value() + 15)  # what a wheel or PageDown does
        qtbot.wait(1)  # the window moves once the document's scrolling is over
        firsts.append(pane.first_visible_token())
        if pane.window_stop == len(spans) and native.value() == native.maximum():
            break
    assert pane.window_stop == len(spans)
    assert firsts == sorted(firsts), "scrolling down never jumps back"
    assert pane.bar.value() == pane.first_visible_token()


def test_the_token_under_the_mouse_is_the_right_one_far_down(pane, qtbot):
    text, spans = _text()
    pane.set_content(text, spans)
    asked = []
    pane.tooltip_for = lambda token: asked.append(token) or f"token {token}"
    target = len(spans) - 50
    pane.scroll_to_token(target)
    first, last = pane.visible_tokens()
    assert first <= target <= last
    for token in (target, min(target + 5, last)):
        point = pane.point_of_token(token)
        assert pane.token_at_point(point) == token
        with qtbot.waitSignal(pane.token_clicked, timeout=2000, check_params_cb=lambda i, t=token: i == t):
            qtbot.mouseClick(pane.viewport(), Qt.MouseButton.LeftButton, pos=point)
        event = QHelpEvent(QEvent.Type.ToolTip, point, pane.viewport().mapToGlobal(point))
        pane.eventFilter(pane.viewport(), event)
        assert asked[-1] == token


def test_a_small_text_is_one_window_with_the_documents_own_bar(pane):
    text, spans = _text(20)
    assert len(spans) < WINDOW
    pane.set_content(text, spans)
    assert not pane.paged and not pane.bar.isVisible()
    assert (pane.window_start, pane.window_stop) == (0, len(spans))
    assert pane.document().toPlainText() == text


def test_decoded_windows_match_the_whole_layout():
    text, spans = _text(300)
    rng = np.random.default_rng(0)
    predicted = rng.integers(0, 50, len(spans))
    correct = rng.random(len(spans)) > 0.2
    display = lambda t: f"<{t}>"  # noqa: E731
    pieces = DecodedPieces(text, spans, predicted, correct, display)
    # the reference: token_layout's definition, each token's own characters or its decoded piece
    by_definition = [text[a:b] if ok else display(int(p)) for (a, b), p, ok in zip(spans.tolist(), predicted, correct)]
    assert pieces.whole() == "".join(by_definition)
    for start, stop in [(0, 40), (17, 230), (len(spans) - 30, len(spans))]:
        window = pieces.window(start, stop)
        assert window.text == "".join(by_definition[start:stop])
        assert [window.text[a:b] for a, b in window.spans.tolist()] == by_definition[start:stop]
    plain = TextPieces(text, spans)
    window = plain.window(100, 200)
    assert [window.text[a:b] for a, b in window.spans.tolist()] == [text[a:b] for a, b in spans[100:200].tolist()]
    assert token_layout(text, spans[100:200], predicted[100:200], np.ones(100, bool), display).text == window.text


def test_the_decoded_pane_marks_wrong_tokens_in_its_window(pane):
    text, spans = _text()
    rng = np.random.default_rng(1)
    predicted = rng.integers(0, 9, len(spans))
    correct = rng.random(len(spans)) > 0.1
    pieces = DecodedPieces(text, spans, predicted, correct, lambda t: f"#{t}#")
    target = len(spans) // 2
    pane.set_pieces(pieces, at_token=target)
    pane.mark(np.flatnonzero(~correct), wrong_original_format())
    pane.scroll_to_token(target)
    first, last = pane.visible_tokens()
    mark = wrong_original_format().background().color()
    for token in range(first, last + 1):
        expected = text[spans[token, 0]:spans[token, 1]] if correct[token] else f"#{predicted[token]}#"
        assert _document_piece(pane, token) == expected
        assert (_background(pane, token) == mark) == (not correct[token])


def test_opening_a_text_makes_no_whole_text_document_in_any_pane(qtbot, window, monkeypatch):
    """In the workbench: every text pane of every view holds a window, not the text."""
    monkeypatch.setattr(TokenText, "WINDOW_TOKENS", 3000)  # a few screens of the window's panes, a seventh of the text
    wb = window.workbench
    text = wb.text * 2
    wb.set_text(text, "twice the demo text")
    qtbot.waitUntil(lambda: all(e.ready and e.text_sha == wb.text_sha for e in wb.entries.values()), timeout=120_000)
    qtbot.waitUntil(lambda: window.live.result is not None and window.live.task is None
                    and window.live.shown_key == window.live._key(), timeout=120_000)
    panes = window.findChildren(TokenText)
    assert len(panes) >= 4
    for widget in panes:
        assert widget.document().characterCount() < len(text) / 4, type(widget.parent())
    live = window.live
    assert live.original.pieces.text is wb.text  # the one loaded text, shared
    result = live.result
    window.show_view("live")
    qtbot.wait(50)
    target = live.original.num_tokens * 3 // 4
    live.original.scroll_to_token(target)
    qtbot.wait(200)  # each pane's window moves once its own scrolling is over
    first, last = live.decoded.visible_tokens()
    assert abs(first - live.original.first_visible_token()) < 80  # the two panes follow each other
    marked = set(live.decoded.marked_tokens().tolist())
    assert marked == set(np.flatnonzero(~result.correct)[:4000].tolist())

"""The compare view's text: two checkpoints' decodes at one sigma side by side, each token
marked only-A-right, only-B-right or both-wrong (Qt-free; the workbench only paints it)."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from core.analyses.compare import ALPHA, Comparison, PairedComparison, unit_correctness
from core.analyses.views import token_layout
from core.engine.sweep import SweepResult

ONLY_A, ONLY_B, BOTH = 1, 2, 3  # 0: both right


@dataclass
class SidePane:
    text: str  # the text as this checkpoint decoded it (right tokens keep their characters)
    spans: np.ndarray  # [T, 2] each token's characters in `text`
    levels: np.ndarray  # [T] 0, ONLY_A, ONLY_B or BOTH
    correct: np.ndarray  # [T] bool, this checkpoint at this sigma (repeat 0)

    @property
    def wrong(self) -> int:
        return int((~self.correct).sum())


@dataclass
class SideBySide:
    sigma_index: int
    pair_index: int
    unit: str
    a: SidePane
    b: SidePane

    def marked_counts(self) -> tuple[int, int]:
        """How many tokens A's pane marks only-A-right and only-B-right."""
        return int((self.a.levels == ONLY_A).sum()), int((self.a.levels == ONLY_B).sum())


def unit_levels(correct_a: np.ndarray, correct_b: np.ndarray) -> np.ndarray:
    """Per compared unit (token or character): 0, ONLY_A, ONLY_B or BOTH (wrong)."""
    levels = np.zeros(len(correct_a), dtype=np.int8)
    levels[correct_a & ~correct_b] = ONLY_A
    levels[~correct_a & correct_b] = ONLY_B
    levels[~correct_a & ~correct_b] = BOTH
    return levels


def token_levels(levels: np.ndarray, result: SweepResult, unit: str) -> np.ndarray:
    """Marks on one checkpoint's tokens: the unit's own mark, or for characters the strongest
    mark among the characters the token holds (only-A, then only-B, then both)."""
    if unit == "token":
        return levels.astype(np.int8)
    spans = result.chunks.spans
    n = len(levels)
    out = np.zeros(len(spans), dtype=np.int8)
    starts, ends = spans[:, 0].astype(np.int64), spans[:, 1].astype(np.int64)
    empty = ends <= starts
    probe_start = np.where(empty, np.minimum(starts, max(n - 1, 0)), starts)
    probe_end = np.where(empty, np.minimum(starts, max(n - 1, 0)) + 1, ends)
    for mark in (BOTH, ONLY_B, ONLY_A):  # later marks win
        has = np.concatenate([[0], np.cumsum(levels == mark)])
        hit = has[np.minimum(probe_end, n)] - has[np.minimum(probe_start, n)] > 0
        out[hit] = mark
    return out


def side_pane(result: SweepResult, sigma_index: int, levels: np.ndarray) -> SidePane:
    correct = unit_correctness(result, sigma_index, "token")
    layout = token_layout(result.chunks.text, result.chunks.spans, result.decoded[:, sigma_index], correct,
                          result.display)
    return SidePane(layout.text, layout.spans, levels, correct)


def side_by_side(a: SweepResult, b: SweepResult, sigma_index: int, pair_index: int, unit: str) -> SideBySide:
    levels = unit_levels(unit_correctness(a, sigma_index, unit), unit_correctness(b, sigma_index, unit))
    return SideBySide(sigma_index, pair_index, unit,
                      side_pane(a, sigma_index, token_levels(levels, a, unit)),
                      side_pane(b, sigma_index, token_levels(levels, b, unit)))


def comparison_side_by_side(comparison: Comparison, sigma_index: int, pair_index: int) -> SideBySide:
    """A (the reference) and the pair's B at one sigma of the main noise."""
    main = comparison.main_sweeps()
    return side_by_side(main[0], main[pair_index + 1], sigma_index, pair_index, comparison.paired[pair_index].unit)


def first_sigma_to_show(pair: PairedComparison | None, alpha: float = ALPHA) -> int:
    """Where the text view opens: the first sigma at which A and B differ significantly, else
    the one where they disagree on the most units."""
    rows = pair.rows if pair is not None else []
    significant = [i for i, r in enumerate(rows) if r.pvalue < alpha]
    if significant:
        return significant[0]
    return int(np.argmax([r.a_only + r.b_only for r in rows])) if rows else 0

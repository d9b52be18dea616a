"""Per-token views of a sweep: the most fragile token types and what they turn into."""

from __future__ import annotations

from collections import Counter
from dataclasses import dataclass

import numpy as np

from core.codecs.tokenizer import token_display


@dataclass
class FragileType:
    token_id: int
    text: str
    count: int
    broken: int  # occurrences that broke somewhere on the grid
    mean_critical_sigma: float  # over occurrences that broke; NaN if none did
    median_critical_sigma: float  # unbroken occurrences count as +inf
    common_wrong_id: int | None
    common_wrong_text: str
    common_wrong_count: int


def fragile_types(result, tokenizer=None, min_count: int = 1) -> list[FragileType]:
    """Token types sorted from most fragile (lowest median critical sigma, then mean) to least."""
    if tokenizer is not None:
        def show(i: int) -> str:
            return token_display(tokenizer, i)
    else:
        show = result.display
    ids = result.chunks.token_ids
    crit = result.critical_sigma
    wrong_decodes = result.decoded.astype(np.int64)
    out: list[FragileType] = []
    order = np.argsort(ids, kind="stable")
    sorted_ids = ids[order]
    bounds = np.flatnonzero(np.diff(sorted_ids)) + 1
    for group in np.split(order, bounds):
        if len(group) < min_count:
            continue
        tid = int(ids[group[0]])
        c = crit[group]
        finite = c[~np.isnan(c)]
        wrong = Counter()
        rows = wrong_decodes[group]
        for row in rows:
            wrong.update(int(x) for x in row[row != tid])
        common = wrong.most_common(1)
        filled = np.where(np.isnan(c), np.inf, c)
        out.append(
            FragileType(
                token_id=tid,
                text=show(tid),
                count=len(group),
                broken=len(finite),
                mean_critical_sigma=float(finite.mean()) if len(finite) else float("nan"),
                median_critical_sigma=float(np.median(filled)),
                common_wrong_id=common[0][0] if common else None,
                common_wrong_text=show(common[0][0]) if common else "",
                common_wrong_count=common[0][1] if common else 0,
            )
        )
    out.sort(key=lambda f: (f.median_critical_sigma, np.nan_to_num(f.mean_critical_sigma, nan=np.inf), -f.count))
    return out


def broken_count(result) -> int:
    """Tokens that broke somewhere on the grid (a critical sigma)."""
    return int((~np.isnan(result.critical_sigma)).sum())


def most_fragile_occurrence(result, token_id: int | None = None) -> int | None:
    """The token index with the lowest critical sigma, among the occurrences of `token_id`
    (or the whole text); the first one on a tie or when none broke. None if the type is absent."""
    crit = result.critical_sigma
    where = np.arange(len(crit)) if token_id is None else np.flatnonzero(result.chunks.token_ids == int(token_id))
    if len(where) == 0:
        return None
    return int(where[np.argmin(np.where(np.isnan(crit[where]), np.inf, crit[where]))])

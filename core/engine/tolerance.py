"""Tolerances: how much noise a codec takes before its token accuracy falls, in one vocabulary.

Two kinds, both read off the token-accuracy curve of a sweep and interpolated on its grid
(DESIGN.md, "Metrics at each sigma"):

- absolute: the largest σ before accuracy first drops below a level (99.9 / 99 / 90 %).
  It reads "accuracy ≥ 99 %".
- loss: the largest σ before accuracy first falls more than 0.1 / 1 / 10 percentage points
  below its own σ = 0 value. It reads "loss ≤ 1 pt". It separates the noise's effect from a
  text the codec already reconstructs imperfectly: a codec at 99.5 % on σ = 0 "fails at 0"
  at 99.9 % yet has a finite loss tolerance.

Resolvable (sample size). A tolerance says something only when the text has enough tokens
to tell its level from the neighbouring one. The rule: take the Wilson 95 % interval of the
accuracy at σ = 0 over the text's tokens (distinct tokens, not tokens × repeats: at σ = 0
every repeat decodes alike); when it is wider than the gap between the level and its
neighbour (0.9 points between 99.9 % and 99 %, and between 0.1 pt and 1 pt; 9 points for
the others), the tolerance is "unresolvable". With no errors that needs 423 tokens for
99.9 % and 0.1 pt, and 39 for the others. A "fails at 0" whose whole interval lies below
the level is a measured verdict and stays. Without σ = 0 on the grid, the first grid point
stands in for it.

Every text a tolerance is shown as goes through `tolerance_text`; every level's name through
`level_name`.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass
from typing import Any, Mapping, Sequence

from core.engine.metrics import wilson_interval

ABSOLUTE = "absolute"
LOSS = "loss"
KINDS = (ABSOLUTE, LOSS)
TOLERANCE_LEVELS = (0.999, 0.99, 0.9)  # token accuracy
LOSS_LEVELS = (0.001, 0.01, 0.1)  # accuracy lost from its σ = 0 value: 0.1, 1 and 10 points

OK = "ok"
ABOVE_GRID = "above_grid"  # never crossed on the grid: sigma is the grid's last point, a lower bound
BELOW_AT_ZERO = "below_at_zero"  # already crossed at the grid's first point: sigma is None
UNRESOLVABLE = "unresolvable"  # too few tokens to tell this level from its neighbour: sigma is None
NO_ZERO = "no_zero"  # a loss tolerance on a grid without σ = 0: sigma is None
STATUSES = (OK, ABOVE_GRID, BELOW_AT_ZERO, UNRESOLVABLE, NO_ZERO)

STATUS_TEXT = {BELOW_AT_ZERO: "fails at 0", UNRESOLVABLE: "too few tokens", NO_ZERO: "needs σ = 0"}
STATUS_MEANING = {
    ABOVE_GRID: "“> x”: never crossed on the grid",
    BELOW_AT_ZERO: "“fails at 0”: already below the level at σ = 0",
    UNRESOLVABLE: "“too few tokens”: the text is too short to resolve the level",
    NO_ZERO: "“needs σ = 0”: a loss tolerance is measured from σ = 0",
}


def levels_of(kind: str) -> tuple[float, ...]:
    return TOLERANCE_LEVELS if kind == ABSOLUTE else LOSS_LEVELS


def level_percent(level: float, kind: str = ABSOLUTE) -> str:
    """The bare level: "99.9 %" (absolute) or "0.1 pt" (loss)."""
    return f"{level * 100:g} %" if kind == ABSOLUTE else f"{level * 100:g} pt"


def level_name(level: float, kind: str = ABSOLUTE) -> str:
    """What a tolerance holds to: "accuracy ≥ 99 %" or "loss ≤ 1 pt"."""
    return f"accuracy ≥ {level_percent(level, kind)}" if kind == ABSOLUTE else f"loss ≤ {level_percent(level, kind)}"


def level_key(level: float) -> str:
    """A level as a dictionary key or a column suffix: "0.999"."""
    return f"{level:g}"


@dataclass
class Tolerance:
    """One tolerance of one sweep: the largest σ before the accuracy first crosses `level`.

    kind "absolute": level is a token accuracy; kind "loss": level is the accuracy lost from
    its σ = 0 value. status is one of STATUSES; sigma is None unless status is ok or above_grid.
    """

    level: float
    sigma: float | None
    status: str
    kind: str = ABSOLUTE

    def label(self) -> str:
        return tolerance_text(self)

    @property
    def name(self) -> str:
        return level_name(self.level, self.kind)

    @property
    def found(self) -> bool:
        """True when sigma is a measured tolerance (drawn on plots), not a bound or a missing value."""
        return self.status == OK and self.sigma is not None

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)

    @classmethod
    def from_dict(cls, data: Mapping[str, Any], kind: str | None = None) -> "Tolerance":
        """The JSON form back; files older than the loss tolerance have no "kind"."""
        sigma = data.get("sigma")
        return cls(level=float(data["level"]), sigma=None if sigma is None else float(sigma),
                   status=str(data["status"]), kind=str(data.get("kind", kind or ABSOLUTE)))


def tolerance_text(tolerance: Tolerance | Mapping[str, Any] | float | None, status: str | None = None, *,
                   digits: int = 4, prefix: str = "") -> str:
    """How a tolerance reads, everywhere: "0.2039", "> 0.8", "fails at 0", "too few tokens",
    "needs σ = 0"; "—" when there is none. Takes a Tolerance, its JSON form, or (sigma, status).
    `prefix` goes before a number (the sweep headline writes "σ 0.204")."""
    if isinstance(tolerance, Tolerance):
        sigma, status = tolerance.sigma, tolerance.status
    elif isinstance(tolerance, Mapping):
        sigma, status = tolerance.get("sigma"), tolerance.get("status")
    else:
        sigma = tolerance
    if status in STATUS_TEXT:
        return STATUS_TEXT[status]
    if sigma is None or status is None:
        return "—"
    if status == ABOVE_GRID:
        return f"{prefix}> {sigma:.{digits}g}"
    return f"{prefix}{sigma:.{digits}g}"


def resolution_gap(level: float, kind: str = ABSOLUTE) -> float:
    """The gap between a level and its neighbour: the next coarser level, or for the coarsest the next finer."""
    levels = levels_of(kind)  # finest first, in both kinds
    i = min(range(len(levels)), key=lambda j: abs(levels[j] - level))
    other = levels[i + 1] if i + 1 < len(levels) else levels[i - 1]
    return round(abs(other - levels[i]), 12)


def resolvable(accuracy0: float, tokens: int, level: float, kind: str = ABSOLUTE) -> bool:
    """Whether `tokens` tokens at accuracy `accuracy0` (σ = 0) can resolve `level` (module docstring)."""
    if tokens <= 0 or accuracy0 != accuracy0:
        return False
    low, high = wilson_interval(int(round(accuracy0 * tokens)), int(tokens))
    if high - low <= resolution_gap(level, kind):
        return True
    return kind == ABSOLUTE and high < level  # "fails at 0" with the whole interval below: a verdict


def _crossing(sigmas: Sequence[float], accuracy: Sequence[float], threshold: float, level: float, kind: str) -> Tolerance:
    for i, (s, a) in enumerate(zip(sigmas, accuracy)):
        if a < threshold:
            if i == 0:
                return Tolerance(level, None, BELOW_AT_ZERO, kind)
            s0, a0 = sigmas[i - 1], accuracy[i - 1]
            fraction = (a0 - threshold) / (a0 - a) if a0 != a else 0.0
            return Tolerance(level, float(s0 + fraction * (s - s0)), OK, kind)
    return Tolerance(level, float(sigmas[-1]), ABOVE_GRID, kind)


def _checked(t: Tolerance, accuracy: Sequence[float], tokens: int | None) -> Tolerance:
    if tokens is not None and not resolvable(float(accuracy[0]), tokens, t.level, t.kind):
        return Tolerance(t.level, None, UNRESOLVABLE, t.kind)
    return t


def tolerance_at(sigmas: Sequence[float], accuracy: Sequence[float], level: float, tokens: int | None = None) -> Tolerance:
    """Absolute tolerance at `level`; with `tokens` (the text's token count) also checked for resolution."""
    return _checked(_crossing(sigmas, accuracy, level, level, ABSOLUTE), accuracy, tokens)


def loss_tolerance_at(sigmas: Sequence[float], accuracy: Sequence[float], loss: float, tokens: int | None = None) -> Tolerance:
    """Loss tolerance: the largest σ before accuracy first falls more than `loss` below its σ = 0 value."""
    if not len(sigmas) or sigmas[0] != 0:
        return Tolerance(loss, None, NO_ZERO, LOSS)
    return _checked(_crossing(sigmas, accuracy, accuracy[0] - loss, loss, LOSS), accuracy, tokens)


def tolerances_of(sigmas: Sequence[float], accuracy: Sequence[float], tokens: int | None = None
                  ) -> tuple[list[Tolerance], list[Tolerance]]:
    """Every absolute and every loss tolerance of one accuracy curve."""
    return ([tolerance_at(sigmas, accuracy, level, tokens) for level in TOLERANCE_LEVELS],
            [loss_tolerance_at(sigmas, accuracy, loss, tokens) for loss in LOSS_LEVELS])


def status_notes(tolerances: Sequence[Tolerance | Mapping[str, Any]], skip: Sequence[str] = ()) -> list[str]:
    """The meaning of every special status among `tolerances` (but those in `skip`), for a table's footnote."""
    seen = {t.status if isinstance(t, Tolerance) else t.get("status") for t in tolerances} - set(skip)
    return [STATUS_MEANING[s] for s in STATUSES if s in seen and s in STATUS_MEANING]


def resolution_note(tokens: int, tolerances: Sequence[Tolerance]) -> str | None:
    """One sentence when some tolerances are unresolvable at this text's size, else None."""
    missing = [t for t in tolerances if t.status == UNRESOLVABLE]
    if not missing:
        return None
    on = f"on {tokens:,} token{'s' if tokens != 1 else ''}"
    what = f"no tolerance is resolvable {on}" if len(missing) == len(tolerances) else \
        ", ".join(t.name for t in missing) + f": not resolvable {on}"
    return f"{what}; the Wilson 95 % interval of the accuracy at σ = 0 is wider than the gap to the next level (use a longer text)."

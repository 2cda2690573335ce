"""Study options: the one table of limits and the defaults every surface shares.

The CLI (help and checks), the REST API's request schema (``service/api/schemas.py``), the
dashboard's submit form and the README's table of limits all read :data:`LIMITS`, and
:func:`toposcout.compiler.study.make_tasks` checks every task against it, so an option means
the same and has the same range everywhere. A value outside is refused before any work with a
message naming the option.

>>> LIMITS["seeds"].describe()
'an integer from 1 to 16'
>>> LIMITS["fidelity_target"].describe()
'a number greater than 0 and less than 1'
>>> LIMITS["layers"].check(9)
Traceback (most recent call last):
...
toposcout.compiler.errors.ModelError: layers must be an integer from 1 to 8, got 9
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, Sequence

from toposcout.compiler.errors import ModelError

__all__ = ["Limit", "LIMITS", "DEFAULT_FIDELITY_TARGET", "DEFAULT_REQUIREMENT_TOLERANCE", "requirement_target", "limits_markdown"]

#: relative width of the requirement bisection's final bracket, (upper - lower) / upper, when a
#: study names none: the requirement is the bracket's lower end, at most this far below the threshold.
DEFAULT_REQUIREMENT_TOLERANCE = 0.001

#: the state fidelity the requirement (the largest two-qubit error reaching it) must reach when a
#: study sweeps two or more noise scales and names no target: the same in the CLI, API and client.
DEFAULT_FIDELITY_TARGET = 0.5


@dataclass(frozen=True)
class Limit:
    """The range of one option: ``low``..``high``, each end included unless ``*_open``."""

    name: str
    kind: type  # int or float
    low: float
    high: float
    meaning: str
    low_open: bool = False
    high_open: bool = False

    def describe(self) -> str:
        what = "an integer" if self.kind is int else "a number"
        if not self.low_open and not self.high_open:
            return f"{what} from {_fmt(self.low)} to {_fmt(self.high)}"
        lo = f"greater than {_fmt(self.low)}" if self.low_open else f"at least {_fmt(self.low)}"
        hi = f"less than {_fmt(self.high)}" if self.high_open else f"at most {_fmt(self.high)}"
        return f"{what} {lo} and {hi}"

    def ok(self, v: Any) -> bool:
        if isinstance(v, bool) or not isinstance(v, (int, float)):
            return False
        if self.kind is int and not isinstance(v, int):
            return False
        if not math.isfinite(v):
            return False
        above = v > self.low if self.low_open else v >= self.low
        below = v < self.high if self.high_open else v <= self.high
        return above and below

    def check(self, v: Any, field: str | None = None) -> None:
        """Raise ModelError naming the option (``field``, default its name) unless ``v`` is in range."""
        if not self.ok(v):
            raise ModelError(f"{field or self.name} must be {self.describe()}, got {v!r}", field=field or self.name)

    def pydantic(self) -> dict[str, float]:
        """The bounds as pydantic ``Field`` keywords (``ge``/``gt``, ``le``/``lt``)."""
        return {("gt" if self.low_open else "ge"): self.low, ("lt" if self.high_open else "le"): self.high}


def _fmt(x: float) -> str:
    return str(int(x)) if float(x).is_integer() else repr(x)


LIMITS: dict[str, Limit] = {L.name: L for L in (
    Limit("seeds", int, 1, 16, "transpiler seeds tried by the generic strategy"),
    Limit("layers", int, 1, 8, "repetitions of the clique block and the rotations"),
    Limit("seed", int, 0, 2**31 - 1, "seed of the random angles"),
    Limit("max_order", int, 1, 16, "keep only terms of at most this order"),
    Limit("noise_scale", float, 0, 1000, "every error rate of the profile times this"),
    Limit("fidelity_target", float, 0, 1, "state fidelity the requirement must reach", low_open=True, high_open=True),
    Limit("requirement_tolerance", float, 0, 0.5, "relative width of the requirement's final bracket",
          low_open=True),
    Limit("trajectories", int, 1, 20000, "trajectories method: exactly this many trajectories"),
    Limit("precision", float, 0, 1, "trajectories method: stop at this standard error of the state fidelity",
          low_open=True, high_open=True),
    Limit("time_budget_seconds", float, 0, 3600, "wall time the noise figures of one row may take",
          low_open=True),
)}


def requirement_target(fidelity_target: float | None, noise_scales: Sequence[float], compile_only: bool) -> float | None:
    """The fidelity target a study's requirement search uses: the one given, else
    :data:`DEFAULT_FIDELITY_TARGET` for a sweep of two or more noise scales, else none.

    >>> requirement_target(None, [0.5, 1, 2], False), requirement_target(None, [1], False)
    (0.5, None)
    >>> requirement_target(0.9, [1], False), requirement_target(0.9, [1, 2], True)
    (0.9, None)
    """
    if compile_only:
        return None
    if fidelity_target is not None:
        return fidelity_target
    return DEFAULT_FIDELITY_TARGET if len(list(noise_scales)) > 1 else None


def limits_markdown() -> str:
    """The table of limits as Markdown (the README carries it; a test keeps them equal)."""
    lines = ["| option | range | meaning |", "|---|---|---|"]
    for L in LIMITS.values():
        lines.append(f"| `{L.name}` | {L.describe()} | {L.meaning} |")
    return "\n".join(lines)

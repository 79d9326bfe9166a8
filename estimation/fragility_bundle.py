"""What a fragility bootstrap run stores: the wild bootstrap tests and sets, the analytic ones of the same model
beside them, and optionally the pairs bootstrap interval and bootstrapped first-stage F."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from ivdossier.estimation.fragility_data import CAUTION
from ivdossier.estimation.pairs_bootstrap import PairsBootstrapResult
from ivdossier.estimation.robust_inference import Interval
from ivdossier.estimation.wild_bootstrap import WildBootstrapResult
from ivdossier.jsonsafe import Record, json_safe


def _sets(intervals: list[Interval] | None) -> Any:
    return None if intervals is None else [json_safe(list(i)) for i in intervals]


def _text(intervals: list[Interval] | None) -> str:
    if intervals is None:
        return "not computed"
    return "empty" if not intervals else " U ".join(f"[{lo:.4g}, {hi:.4g}]" for lo, hi in intervals)


@dataclass(frozen=True)
class BootstrapBundle(Record):
    """Wild bootstrap (and optional pairs bootstrap) of one model, with the analytic interval and AR set."""

    wild: WildBootstrapResult
    pairs: PairsBootstrapResult | None
    vcov: str
    analytic_interval: tuple[float, float] | None
    analytic_ar_set: list[Interval] | None

    def to_dict(self) -> dict[str, Any]:
        """JSON-safe dict: the wild and pairs results under their own keys, the analytic sets beside them."""
        return {
            "wild": self.wild.to_dict(),
            "pairs": None if self.pairs is None else self.pairs.to_dict(),
            "analytic": {
                "vcov": self.vcov,
                "t_interval": None
                if self.analytic_interval is None
                else json_safe(list(self.analytic_interval)),
                "anderson_rubin_set": _sets(self.analytic_ar_set),
            },
            "caution": CAUTION,
        }

    def __str__(self) -> str:
        lines = [str(self.wild)]
        if self.wild.applicable:
            lo_hi = self.analytic_interval
            analytic_t = "not computed" if lo_hi is None else f"[{lo_hi[0]:.4g}, {lo_hi[1]:.4g}]"
            lines.append(
                f"  analytic ({self.vcov}) beside them: t interval {analytic_t}; "
                f"Anderson–Rubin set {_text(self.analytic_ar_set)}"
            )
        if self.pairs is not None:
            lines.append(str(self.pairs))
        lines.append(CAUTION)
        return "\n".join(lines)

"""The model specification: which columns play which role and how uncertainty is computed, validated once.

Every path that fits a model (the notebook front end :func:`~ivdossier.estimation.api.estimate`, the command line,
stored runs and plan comparisons) builds one :class:`ModelSpec`, so a combination refused in one place is refused
in all of them with the same message.
"""

from __future__ import annotations

import dataclasses
import math
import warnings
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

from ivdossier.errors import InvalidInputError
from ivdossier.estimation.covariance import COV_KINDS, OLD_COV_NAMES
from ivdossier.estimation.data import as_names
from ivdossier.estimation.estimators import METHODS

#: The options every evidence command shares, as keyword arguments of the estimation functions.
ADJUSTMENT_KEYWORDS: tuple[str, ...] = (
    "controls",
    "absorb",
    "cluster",
    "weights",
    "vcov",
    "small_sample",
    "alpha",
)


@dataclass(frozen=True)
class ModelSpec:
    """Outcome, treatment(s), instruments, controls, absorbed fixed effects, clusters, weights and the method.

    ``outcome`` and ``treatment`` may be left empty for analyses that regress other columns on the instruments
    (balance, placebo outcomes, subgroup first stages). Building one validates the combination of options.
    """

    outcome: str | None = None
    treatment: tuple[str, ...] = ()
    instruments: tuple[str, ...] = ()
    controls: tuple[str, ...] = ()
    absorb: tuple[str, ...] = ()
    cluster: tuple[str, ...] = ()
    weights: str | None = None
    method: str = "2sls"
    vcov: str = "heteroskedastic"
    alpha: float = 0.05
    small_sample: bool = True
    fuller_alpha: float = 1.0

    def __post_init__(self) -> None:
        if self.vcov in OLD_COV_NAMES:
            warnings.warn(
                f"vcov={self.vcov!r} is deprecated and will be removed in the next release; "
                f"use vcov={OLD_COV_NAMES[self.vcov]!r}.",
                DeprecationWarning,
                stacklevel=4,
            )
            object.__setattr__(self, "vcov", OLD_COV_NAMES[self.vcov])
        for name in ("treatment", "instruments", "controls", "absorb", "cluster"):
            object.__setattr__(self, name, as_names(getattr(self, name), name))
        check_options(self.method, self.vcov, self.cluster, self.alpha, self.fuller_alpha)
        if self.method == "ols" and self.instruments:
            raise InvalidInputError(
                "method='ols' takes no instruments; drop instruments= or choose '2sls', 'liml' or 'fuller'."
            )
        if self.method != "ols" and not self.instruments:
            raise InvalidInputError(
                f"method={self.method!r} needs instruments=; name at least one instrument column."
            )

    @classmethod
    def build(
        cls,
        *,
        outcome: str | None = None,
        treatment: str | Sequence[str] = (),
        instruments: str | Sequence[str] = (),
        controls: str | Sequence[str] | None = (),
        absorb: str | Sequence[str] | None = (),
        cluster: str | Sequence[str] | None = None,
        weights: str | None = None,
        method: str = "2sls",
        vcov: str = "heteroskedastic",
        alpha: float = 0.05,
        small_sample: bool = True,
        fuller_alpha: float = 1.0,
    ) -> ModelSpec:
        """Build from keyword arguments that accept one name or a list of names per role."""
        return cls(
            outcome=outcome,
            treatment=as_names(treatment, "treatment"),
            instruments=as_names(instruments, "instruments"),
            controls=as_names(controls, "controls"),
            absorb=as_names(absorb, "absorb"),
            cluster=as_names(cluster, "cluster"),
            weights=weights,
            method=method,
            vcov=vcov,
            alpha=alpha,
            small_sample=small_sample,
            fuller_alpha=fuller_alpha,
        )

    @classmethod
    def from_echo(cls, stored: Mapping[str, Any]) -> ModelSpec:
        """Rebuild (and so validate) a spec from its stored form (:meth:`echo`, a run's or a plan's spec);
        keys other than the spec's fields (the data path, an analysis's own options) are ignored."""
        names = {f.name for f in dataclasses.fields(cls)}
        given = {k: v for k, v in stored.items() if k in names and v is not None}
        if isinstance(given.get("vcov"), str):  # runs and plans stored with the old words read silently
            given["vcov"] = OLD_COV_NAMES.get(given["vcov"], given["vcov"])
        return cls.build(**given)

    @property
    def used(self) -> list[str]:
        """Every column the model reads, once each, in role order."""
        names = [
            *([self.outcome] if self.outcome else []),
            *self.treatment,
            *self.instruments,
            *self.controls,
            *self.absorb,
            *self.cluster,
        ]
        return list(dict.fromkeys(names + ([self.weights] if self.weights else [])))

    def adjustment(self) -> dict[str, Any]:
        """Controls, fixed effects, clusters, weights, covariance and level as keyword arguments."""
        out = {name: getattr(self, name) for name in ADJUSTMENT_KEYWORDS}
        out["cluster"] = self.cluster or None
        return out

    def single_treatment(self) -> str:
        """The one treatment column of analyses defined for a single treatment."""
        if len(self.treatment) != 1:
            raise InvalidInputError(
                f"this analysis takes one treatment column, got {len(self.treatment)} "
                f"({', '.join(self.treatment) or 'none'}); pass exactly one treatment."
            )
        return self.treatment[0]

    def echo(self) -> dict[str, Any]:
        """The spec as stored with a run (lists for roles, the option values as given)."""
        return {
            "outcome": self.outcome,
            "treatment": list(self.treatment),
            "instruments": list(self.instruments),
            "controls": list(self.controls),
            "absorb": list(self.absorb),
            "cluster": list(self.cluster),
            "weights": self.weights,
            "method": self.method,
            "vcov": self.vcov,
            "small_sample": self.small_sample,
            "alpha": self.alpha,
            "fuller_alpha": self.fuller_alpha,
        }


def check_options(
    method: str, vcov: str, cluster: tuple[str, ...], alpha: float, fuller_alpha: float
) -> None:
    """Refuse an unknown method or covariance, clusters without vcov='clustered' (or the reverse), a bad level."""
    if method not in METHODS:
        raise InvalidInputError(f"Unknown method {method!r}; choose one of {', '.join(METHODS)}.")
    vcov = OLD_COV_NAMES.get(vcov, vcov)  # the deprecated words still validate
    if vcov not in COV_KINDS:
        raise InvalidInputError(f"Unknown vcov {vcov!r}; choose one of {', '.join(COV_KINDS)}.")
    if vcov == "clustered" and not cluster:
        raise InvalidInputError("vcov='clustered' needs cluster= (one or two column names); pass cluster=.")
    if cluster and vcov != "clustered":
        raise InvalidInputError(
            f"cluster= was given with vcov={vcov!r}; use vcov='clustered' to cluster, or drop cluster=."
        )
    if isinstance(alpha, bool) or not isinstance(alpha, int | float) or not 0.0 < alpha < 1.0:
        raise InvalidInputError(f"alpha must lie strictly between 0 and 1, got {alpha!r}.")
    if not (isinstance(fuller_alpha, int | float) and not math.isnan(fuller_alpha) and fuller_alpha >= 0.0):
        raise InvalidInputError(f"fuller_alpha must be non-negative, got {fuller_alpha!r}.")

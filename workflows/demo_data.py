"""Simulated data for the invented demo: does adopting telehealth visits reduce emergency-department visits?

Everything here is invented. The true effect, the confounding and one exclusion violation are planted on
purpose so that the tool can be seen catching them:

- ``frailty`` (unobserved) raises both telehealth adoption and emergency visits, so OLS is biased upwards;
- ``fibre_months`` (months since the invented utility's fibre reached the postal district, set by an engineering
  schedule) is a valid instrument;
- ``clerk_video_rate`` (the historical video-visit share of the scheduling clerk a patient happened to get) moves
  adoption, but clerks who like video visits also book prompt follow-ups, which cut emergency visits directly: a
  planted exclusion violation;
- ``clerk`` and ``clinic``: each postal district belongs to one of ``CLINICS`` clinics, and the clinic's rota
  assigns each call to one of its clerks at random (so assignment is as good as random within a clinic, the cell a
  leave-out design absorbs). The last clerk of every clinic is a relief clerk who takes only occasional calls
  (about ``RELIEF_CALLS`` a year), so the design's check for decision-makers with few cases has something to flag;
- ``mast_km`` (distance to the nearest mobile mast) is valid but weak;
- patients without a capable device (``has_device == 0``) cannot adopt telehealth at all: a subgroup where every
  instrument should have no reduced-form effect if exclusion holds;
- ``prior_ed_visits`` (the year before) is a placebo outcome no instrument can have caused.

The outcome is a count (non-negative whole numbers), built as the sum of two independent counts:

- avoidable visits, Poisson with mean ``AVOIDABLE_RATE`` = 0.6 for every patient who does not use telehealth and
  none for one who does (a video visit handles the minor problem instead);
- other visits, negative binomial (a gamma-mixed Poisson with shape ``DISPERSION``) with a log-linear mean in
  frailty, chronic conditions, age and the clerk's follow-up habit.

So adopting telehealth lowers every patient's expected number of emergency visits by exactly 0.6, whatever the
patient's other traits: the true effect on the mean count is the linear ``TRUE_EFFECT`` = -0.6 visits for
everyone, hence also the local average effect for the compliers of any instrument. The planted violation acts
on the log mean of other visits: one unit of follow-up habit multiplies it by exp(``FOLLOWUP_EFFECT``).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import pandas as pd

from ivdossier.errors import InvalidInputError

AVOIDABLE_RATE = 0.6  # expected avoidable emergency visits a year without telehealth (none with it)
TRUE_EFFECT = -AVOIDABLE_RATE  # effect of adopting telehealth on the expected number of visits, every patient
FOLLOWUP_EFFECT = -0.12  # log-mean effect of one unit of a clerk's follow-up habit (the planted violation)
DISPERSION = 5.0  # gamma shape of the negative-binomial mixing: variance = mean + mean^2 / DISPERSION
CLINICS = 8  # clinics, each with its own rota of clerks (clerks // CLINICS per clinic)
RELIEF_SHARE = 0.075  # a relief clerk's chance of taking a call, relative to a regular clerk of the same rota
RELIEF_CALLS = 12  # about 1,500 calls a clinic x 0.075 / 9.075: the expected cases of a relief clerk


@dataclass(frozen=True)
class DemoTruth:
    """What the simulation planted, so tests and the demo can compare estimates with the truth."""

    effect: float = TRUE_EFFECT
    followup_effect: float = FOLLOWUP_EFFECT
    valid_instrument: str = "fibre_months"
    violating_instrument: str = "clerk_video_rate"
    weak_instrument: str = "mast_km"


def simulate_telehealth(
    n: int = 12_000,
    *,
    seed: int = 20261202,
    districts: int = 300,
    clerks: int = 80,
    set_telehealth: int | None = None,
) -> pd.DataFrame:
    """One row per rural patient; columns named for the invented scenario.

    ``set_telehealth`` (0 or 1) overrides everyone's adoption after all other draws, giving the potential
    outcomes of the same patients (for checking the planted effect); leave it None for the demo data.
    """
    rng = np.random.default_rng(seed)
    district = rng.integers(0, districts, size=n)
    wave_of_district = rng.integers(1, 6, size=districts)  # engineering schedule, unrelated to health
    fibre_months = (5 - wave_of_district[district]) * 6 + rng.integers(0, 6, size=n)
    mast_of_district = rng.gamma(2.0, 2.5, size=districts)
    mast_km = np.round(mast_of_district[district] + rng.normal(0, 0.3, size=n).clip(-1, 1), 2)

    # the rota: as good as random within a clinic
    clerk, clinic = _rota(rng, district, districts=districts, clerks=clerks)
    clerk_taste = rng.normal(0.0, 1.0, size=clerks)
    clerk_video_rate = 1 / (1 + np.exp(-(-0.4 + 0.8 * clerk_taste)))  # historical share of video bookings
    followup_habit = 0.7 * clerk_taste + rng.normal(0, 0.6, size=clerks)

    age = rng.integers(18, 90, size=n)
    frailty = rng.normal(0.0, 1.0, size=n)
    chronic = rng.poisson(np.exp(0.2 + 0.35 * frailty + 0.01 * (age - 50)))
    has_device = (rng.random(n) < 0.82).astype(int)

    latent = (
        -1.3
        + 0.055 * fibre_months
        + 2.4 * (clerk_video_rate[clerk] - clerk_video_rate.mean())
        - 0.015 * mast_km
        + 0.8 * frailty
        + 0.1 * chronic
        - 0.01 * (age - 50)
        + rng.logistic(0.0, 1.0, size=n)
    )
    telehealth = has_device * (latent > 0).astype(int)
    if set_telehealth is not None:
        if set_telehealth not in (0, 1):
            raise InvalidInputError(f"set_telehealth must be 0, 1 or None, got {set_telehealth!r}.")
        telehealth = np.full(n, int(set_telehealth))

    # other (non-avoidable) visits: log-linear mean, gamma-mixed Poisson (negative binomial)
    log_mean = (
        math.log(1.25)
        + 0.35 * frailty
        + 0.08 * chronic
        + 0.006 * (age - 50)
        + FOLLOWUP_EFFECT * followup_habit[clerk]
    )
    other = rng.poisson(np.exp(log_mean) * rng.gamma(DISPERSION, 1.0 / DISPERSION, size=n))
    avoidable = rng.poisson(AVOIDABLE_RATE, size=n) * (1 - telehealth)
    ed_visits = other + avoidable
    # the year before: no telehealth yet and no clerk assignment, the same health drivers
    prior_mean = np.exp(math.log(1.15) + 0.35 * frailty + 0.08 * chronic + 0.006 * (age - 50))
    prior_ed_visits = rng.poisson(prior_mean * rng.gamma(DISPERSION, 1.0 / DISPERSION, size=n)) + rng.poisson(
        AVOIDABLE_RATE, size=n
    )
    return pd.DataFrame(
        {
            "patient_id": np.arange(1, n + 1),
            "district": district,
            "clinic": clinic,
            "clerk": clerk,
            "age": age,
            "chronic_conditions": chronic,
            "has_device": has_device,
            "fibre_months": fibre_months,
            "clerk_video_rate": np.round(clerk_video_rate[clerk], 4),
            "mast_km": mast_km,
            "telehealth": telehealth,
            "ed_visits": ed_visits.astype(np.int64),
            "prior_ed_visits": prior_ed_visits.astype(np.int64),
        }
    )


def _rota(
    rng: np.random.Generator, district: np.ndarray, *, districts: int, clerks: int
) -> tuple[np.ndarray, np.ndarray]:
    """(clerk, clinic) per patient: the district's clinic, then a clerk drawn from that clinic's rota.

    Clinics cover contiguous blocks of district numbers; each has ``clerks // CLINICS`` clerks, the last of them
    a relief clerk drawn ``RELIEF_SHARE`` times as often as each regular one. Clerk ids are global
    (clinic * clerks per clinic + position on the rota).
    """
    per_clinic = clerks // CLINICS
    if per_clinic < 2 or clerks % CLINICS:
        raise InvalidInputError(
            f"clerks must be a multiple of {CLINICS} with at least two per clinic, got {clerks!r}."
        )
    clinic = (district * CLINICS) // districts
    weights = np.ones(per_clinic)
    weights[-1] = RELIEF_SHARE
    position = np.searchsorted(np.cumsum(weights) / weights.sum(), rng.random(district.size), side="right")
    return clinic * per_clinic + np.minimum(position, per_clinic - 1), clinic

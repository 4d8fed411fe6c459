"""Demo warehouse: a fictional public-library e-book lending app ("the library app").

Patrons of the library app borrow e-books and audiobooks, read in an in-app reader
and join hold queues when licences are limited. This module simulates a small
warehouse for that app, with over a dozen experiments, some of them carrying planted
trust problems whose location and onset are known by construction, so that every
check expwatch runs can be demonstrated (and tested end to end) against an
answer key.

Tables (timestamps are naive UTC)::

    experiments           registry: one row per experiment x phase x variant
    assignments           raw exposure log (stage "assigned")
    assignments_filtered  analysis population after bot filtering (stage "filtered")
    reading_sessions      unit_id, started_at, minutes
    page_renders          unit_id, rendered_at, render_ms
    loans                 unit_id, loaned_at, cancelled
    app_errors            unit_id, occurred_at, error_code
    holds                 unit_id, placed_at, wait_hours

How the data are generated
--------------------------
* One shared patron population (:data:`N_PATRONS`) with segment attributes fixed
  per patron (platform, region, patron type), a per-patron bot flag, an activity
  level and an error proneness.
* For each experiment in :data:`EXPERIMENTS`, new units arrive per hour as a
  Poisson process whose rate follows a diurnal cycle (quiet 02:00-06:00 UTC, peak
  19:00-22:00 UTC) and a weekend uplift (:data:`WEEKEND_FACTOR`). Each arrival is
  a patron not yet in the experiment; its variant is a multinomial draw with the
  weights of the phase in force at the arrival time. Each unit then returns a
  geometric number of times, with exponential gaps, keeping its variant and
  segments.
* Faults attached to an experiment spec (``skew``, ``crash``, ``leak``,
  ``stale``, ``bot_trip``) distort the logs in one documented way each, and each
  describes itself as a :class:`PlantedProblem`. Two more act across units:
  ``contention`` (:class:`LicenceContention`: treatment and control compete for
  the same licences, so hold waits depend on the treatment share) and
  ``bucketing`` (:class:`BucketSharing`: an experiment reuses another's hash, so
  their variants are correlated on the units they share).
* Metric events start :data:`PRE_PERIOD_DAYS` days before the first experiment
  (a pre-period, e.g. for CUPED) and run to :data:`DEMO_AS_OF`. A
  :class:`MetricEffect` scales one numeric event column for the events of a
  variant's units after their first assignment.

Adding an experiment
--------------------
Append an :class:`ExperimentSpec` to :data:`EXPERIMENTS`. Every experiment draws
from its own random stream (keyed by its id), so adding one does not change the
rows of the others. A new kind of fault is a small frozen dataclass with a
``planted(experiment_id, as_of)`` method, a field on :class:`ExperimentSpec`, and one
step in :func:`_experiment_rows`; a new kind of metric effect is a field on
:class:`MetricEffect` handled in :func:`_apply_effects`.
"""

from __future__ import annotations

import logging
import time
import zlib
from dataclasses import dataclass, field, replace
from datetime import datetime, timedelta, timezone
from pathlib import Path

import duckdb
import numpy as np
import pandas as pd

from monitor.errors import ConfigError

__all__ = [
    "DEMO_AS_OF",
    "DEMO_SEED",
    "EXPERIMENTS",
    "TABLE_SCHEMAS",
    "AllocationSkew",
    "BotFilterTrip",
    "BucketSharing",
    "DemoSummary",
    "ExperimentSpec",
    "Leakage",
    "LicenceContention",
    "LoggingCrash",
    "MetricEffect",
    "PhaseSpec",
    "PlantedProblem",
    "StaleLog",
    "build_demo_warehouse",
    "demo_tables",
]

logger = logging.getLogger("monitor")

UTC = timezone.utc

#: The demo's "now": every table ends here (exclusive). Aware UTC.
DEMO_AS_OF: datetime = datetime(2026, 11, 30, 9, 0, tzinfo=UTC)
#: Default seed of the demo generator.
DEMO_SEED: int = 20261130

#: Size of the shared patron population.
N_PATRONS = 250_000
#: Days of metric events before the first experiment starts.
PRE_PERIOD_DAYS = 14
#: Share of patrons flagged as bots (removed from ``assignments_filtered``).
BOT_SHARE = 0.012
#: Return visits per unit are ``Geometric(RETURN_P) - 1`` (mean ``1/p - 1``).
RETURN_P = 0.5
#: Mean gap between a unit's successive visits, in days (exponential).
RETURN_GAP_DAYS = 3.0
#: Arrival-rate multiplier on Saturdays and Sundays (UTC).
WEEKEND_FACTOR = 1.25

PLATFORMS = ("android", "ios", "web")
PLATFORM_P = (0.5, 0.3, 0.2)
REGIONS = ("Lantern Hill", "Ferncombe", "Saltmarsh", "Old Quarry", "Brindle Park")
REGION_P = (0.3, 0.25, 0.2, 0.15, 0.1)
PATRON_TYPES = ("new", "returning")
PATRON_TYPE_P = (0.25, 0.75)
ERROR_CODES = ("SYNC_TIMEOUT", "LICENCE_CHECK", "RENDER_OOM", "NET_OFFLINE", "AUDIO_DECODE")
ERROR_CODE_P = (0.35, 0.2, 0.1, 0.3, 0.05)

# Relative hourly arrival intensity by UTC hour (quiet 02-06, peak 19-22).
_HOURLY = np.array(
    [0.90, 0.60, 0.30, 0.20, 0.20, 0.25, 0.40, 0.60, 0.80, 0.90, 0.95, 1.00,
     1.05, 1.00, 0.95, 0.95, 1.00, 1.15, 1.35, 1.70, 1.90, 1.85, 1.60, 1.20]
)
_HOURLY_REL = _HOURLY / _HOURLY.mean()
_WEEK_MEAN = (5.0 + 2.0 * WEEKEND_FACTOR) / 7.0

#: Column names and SQL types of every demo table, in column order.
TABLE_SCHEMAS: dict[str, tuple[tuple[str, str], ...]] = {
    "experiments": (
        ("experiment_id", "VARCHAR"), ("title", "VARCHAR"), ("owner", "VARCHAR"),
        ("status", "VARCHAR"), ("phase", "INTEGER"), ("phase_start", "TIMESTAMP"),
        ("phase_end", "TIMESTAMP"), ("variant", "VARCHAR"), ("weight", "DOUBLE"),
        ("is_control", "BOOLEAN"),
    ),
    "assignments": (
        ("unit_id", "VARCHAR"), ("experiment_id", "VARCHAR"), ("variant", "VARCHAR"),
        ("assigned_at", "TIMESTAMP"), ("platform", "VARCHAR"), ("region", "VARCHAR"),
        ("patron_type", "VARCHAR"),
    ),
    "assignments_filtered": (
        ("unit_id", "VARCHAR"), ("experiment_id", "VARCHAR"), ("variant", "VARCHAR"),
        ("assigned_at", "TIMESTAMP"), ("platform", "VARCHAR"), ("region", "VARCHAR"),
        ("patron_type", "VARCHAR"),
    ),
    "reading_sessions": (("unit_id", "VARCHAR"), ("started_at", "TIMESTAMP"), ("minutes", "DOUBLE")),
    "page_renders": (("unit_id", "VARCHAR"), ("rendered_at", "TIMESTAMP"), ("render_ms", "DOUBLE")),
    "loans": (("unit_id", "VARCHAR"), ("loaned_at", "TIMESTAMP"), ("cancelled", "BOOLEAN")),
    "app_errors": (("unit_id", "VARCHAR"), ("occurred_at", "TIMESTAMP"), ("error_code", "VARCHAR")),
    "holds": (("unit_id", "VARCHAR"), ("placed_at", "TIMESTAMP"), ("wait_hours", "DOUBLE")),
}

_SEGMENT_COLUMNS = {"platform": PLATFORMS, "region": REGIONS, "patron_type": PATRON_TYPES}
_EVENT_TIME_COLUMN = {
    "reading_sessions": "started_at",
    "page_renders": "rendered_at",
    "loans": "loaned_at",
    "app_errors": "occurred_at",
    "holds": "placed_at",
}


# --------------------------------------------------------------------------- results


@dataclass(frozen=True)
class PlantedProblem:
    """One deliberately planted problem (or real effect) in the demo data.

    Attributes
    ----------
    experiment : str
        Experiment id.
    check : str
        The check that should see it: ``"srm"``, ``"leakage"``, ``"freshness"``,
        ``"guardrail"``, ``"novelty"`` (an effect that changes with days since
        first exposure: a ``novelty`` warning), or ``"effect"`` (a real treatment
        effect that must *not* raise an alert).
    stage : str or None
        ``"assigned"`` or ``"filtered"`` for ``"srm"`` (the first stage where the
        imbalance appears; it carries through to later stages), else None.
    description : str
        One plain sentence.
    onset : datetime or None
        Aware UTC time the problem starts; None means from the experiment start.
    segment : dict of str to str, or None
        The segment the problem is confined to, e.g. ``{"platform": "android"}``.
    """

    experiment: str
    check: str
    stage: str | None
    description: str
    onset: datetime | None = None
    segment: dict[str, str] | None = None


@dataclass(frozen=True)
class DemoSummary:
    """What the demo generator built, including its answer key.

    Attributes
    ----------
    path : Path or None
        The DuckDB file written, or None when the tables were only built in memory.
    as_of : datetime
        Aware UTC end of the data (exclusive).
    live : tuple of str
        Ids of running experiments.
    ended : tuple of str
        Ids of stopped experiments.
    healthy : tuple of str
        Live experiments with no planted problem of any kind (a planted real
        effect, check ``"effect"``, does not count as a problem).
    planted : tuple of PlantedProblem
        Every planted problem and effect, including those in ended experiments
        (which a correct monitor does not alarm on).
    rows : dict of str to int
        Row count per table.
    """

    path: Path | None
    as_of: datetime
    live: tuple[str, ...]
    ended: tuple[str, ...]
    healthy: tuple[str, ...]
    planted: tuple[PlantedProblem, ...]
    rows: dict[str, int]


# --------------------------------------------------------------------------- specs


def _fmt(dt: datetime) -> str:
    return dt.strftime("%Y-%m-%d %H:%M UTC")


@dataclass(frozen=True)
class PhaseSpec:
    """One allocation phase: from ``start`` until the next phase (or the stop).

    Attributes
    ----------
    start : datetime
        Aware UTC start.
    weights : tuple of float
        Designed allocation weights, one per variant of the experiment, summing to 1.
    """

    start: datetime
    weights: tuple[float, ...]


@dataclass(frozen=True)
class AllocationSkew:
    """The assignment service allocates with ``weights`` instead of the designed ones.

    Attributes
    ----------
    weights : tuple of float
        Actual allocation probabilities, one per variant (all phases).
    """

    weights: tuple[float, ...]

    def planted(self, experiment_id: str, as_of: datetime) -> PlantedProblem:
        shares = "/".join(f"{w:.0%}" for w in self.weights)
        return PlantedProblem(
            experiment_id, "srm", "assigned",
            f"The assignment service allocated units {shares} instead of the designed weights.",
        )


@dataclass(frozen=True)
class LoggingCrash:
    """From ``onset``, a share of new units of one variant in a segment is never logged.

    Attributes
    ----------
    variant : str
        Affected variant.
    segment : dict of str to str
        Segment of affected units (keys among platform, region, patron_type).
    share : float
        Probability that an affected new unit crashes before its exposure is logged.
    onset : datetime
        Aware UTC time the crash starts.
    """

    variant: str
    segment: dict[str, str]
    share: float
    onset: datetime

    def planted(self, experiment_id: str, as_of: datetime) -> PlantedProblem:
        seg = ", ".join(f"{k}={v}" for k, v in self.segment.items())
        return PlantedProblem(
            experiment_id, "srm", "assigned",
            f"From {_fmt(self.onset)} about {self.share:.0%} of new {self.variant} units with {seg} "
            "crash before their exposure is logged, so they are missing from both assignment tables.",
            onset=self.onset, segment=dict(self.segment),
        )



@dataclass(frozen=True)
class Leakage:
    """A share of units later also receives exposures in another variant.

    Attributes
    ----------
    share : float
        Probability that a unit leaks (gets 1 or more rows in another variant after
        its first assignment).
    """

    share: float

    def planted(self, experiment_id: str, as_of: datetime) -> PlantedProblem:
        return PlantedProblem(
            experiment_id, "leakage", None,
            f"About {self.share:.0%} of units are later also exposed to another variant.",
        )


@dataclass(frozen=True)
class StaleLog:
    """The experiment's log stops ``hours`` before :data:`DEMO_AS_OF`.

    Attributes
    ----------
    hours : float
        Hours without any row (no new units, no returns) before the end of the data.
    """

    hours: float

    def onset(self, as_of: datetime) -> datetime:
        return as_of - timedelta(hours=self.hours)

    def planted(self, experiment_id: str, as_of: datetime) -> PlantedProblem:
        onset = self.onset(as_of)
        return PlantedProblem(
            experiment_id, "freshness", None,
            f"The experiment is live but its exposure log has had no rows since {_fmt(onset)}.",
            onset=onset,
        )


@dataclass(frozen=True)
class BotFilterTrip:
    """The variant trips the bot filter: extra units of it are dropped at the filtered stage.

    Attributes
    ----------
    variant : str
        Affected variant.
    share : float
        Extra probability (on top of :data:`BOT_SHARE`) that a unit of the variant
        is flagged and removed from ``assignments_filtered`` for this experiment.
    """

    variant: str
    share: float

    def planted(self, experiment_id: str, as_of: datetime) -> PlantedProblem:
        return PlantedProblem(
            experiment_id, "srm", "filtered",
            f"The {self.variant} variant trips the bot filter, which removes about "
            f"{BOT_SHARE + self.share:.0%} of its units versus about {BOT_SHARE:.0%} of the others.",
        )


@dataclass(frozen=True)
class MetricEffect:
    """Scale one numeric event column for a variant's units after their first assignment.

    The multiplier at time ``t`` (days) after a unit's first assignment is
    ``1 + lift`` or, with ``fade_days``,
    ``1 + long_run_lift + (lift - long_run_lift) * exp(-max(t - hold_days, 0) / fade_days)``:
    ``lift`` for the first ``hold_days``, then an exponential approach to
    ``long_run_lift`` (a fading novelty effect when ``|long_run_lift| < |lift|``,
    a growing primacy or learning effect when it is larger).

    Attributes
    ----------
    table : str
        Event table (``reading_sessions`` or ``page_renders``).
    column : str
        Numeric column to scale (``minutes`` or ``render_ms``).
    variant : str
        Variant whose units are affected.
    lift : float
        Relative change, e.g. 0.09 for +9 %.
    check : str
        ``"guardrail"`` (a harm the monitor must flag) or ``"effect"`` (a real
        effect on a primary metric that must not alert).
    description : str
        One plain sentence for the answer key.
    fade_days : float or None
        E-folding time of a time-varying effect; None for a constant effect.
    long_run_lift : float
        The relative change the effect approaches (with ``fade_days``).
    hold_days : float
        Days the effect stays at ``lift`` before it starts to change.
    """

    table: str
    column: str
    variant: str
    lift: float
    check: str
    description: str
    fade_days: float | None = None
    long_run_lift: float = 0.0
    hold_days: float = 0.0

    def planted(self, experiment_id: str, as_of: datetime) -> PlantedProblem:
        return PlantedProblem(experiment_id, self.check, None, self.description)


@dataclass(frozen=True)
class LicenceContention:
    """Treatment and control compete for the same limited e-book licences.

    Units of ``variant`` act on a freed licence first, so they wait less for their holds,
    and the control waits longer; the more units are treated, the more they compete with
    each other. At treatment share ``s`` (the designed share of the phase in force when the
    hold is placed) a hold's wait is multiplied by ``1 - advantage * (1 - s)^2`` for a
    treatment unit and by ``1 + advantage * s * (1 - s)`` for a control unit (after their
    first assignment), which keeps the mean wait over both groups unchanged: the licences
    are only redistributed. The treatment-versus-control contrast therefore shrinks as the
    share ramps up while the control's own wait rises.

    Attributes
    ----------
    variant : str
        The variant that takes licences first.
    advantage : float
        Strength of the head start, in (0, 1).
    """

    variant: str
    advantage: float

    def planted(self, experiment_id: str, as_of: datetime) -> PlantedProblem:
        return PlantedProblem(
            experiment_id, "spillover", None,
            f"Units of the {self.variant} variant take freed licences before control units, so hold waits of the two groups "
            "are not independent: the measured effect shrinks as the treatment share ramps up and control waits rise.",
        )


@dataclass(frozen=True)
class BucketSharing:
    """Two experiments bucket units with the same hash, so their variants are correlated.

    Put it on both experiments of the pair: on the one whose variants are copied with
    ``follows=False`` (its data are unchanged) and on the other with ``follows=True``: a unit in
    both gets the partner's variant index (the partner must come earlier in
    :data:`EXPERIMENTS` and have as many variants).

    Attributes
    ----------
    partner : str
        The other experiment's id.
    follows : bool
        True for the experiment whose variants are copied from the partner's.
    """

    partner: str
    follows: bool

    def planted(self, experiment_id: str, as_of: datetime) -> PlantedProblem:
        return PlantedProblem(
            experiment_id, "collision", None,
            f"The experiment shares its bucketing hash with {self.partner!r}: a unit in both gets the same "
            "variant index in each, so their assignments are correlated.",
        )


@dataclass(frozen=True)
class ExperimentSpec:
    """Everything the generator needs to simulate one experiment.

    Attributes
    ----------
    experiment_id, title, owner : str
        Registry fields (owner is a team alias).
    variants : tuple of str
        Variant names; the first is the control.
    phases : tuple of PhaseSpec
        Allocation phases in time order.
    daily_units : float
        Expected new units per day (weekday/weekend average).
    stop : datetime or None
        Aware UTC stop time; None while the experiment is running.
    skew, crash, leak, stale, bot_trip
        Optional planted faults (see their classes).
    effects : tuple of MetricEffect
        Planted metric effects.
    """

    experiment_id: str
    title: str
    owner: str
    variants: tuple[str, ...]
    phases: tuple[PhaseSpec, ...]
    daily_units: float
    stop: datetime | None = None
    skew: AllocationSkew | None = None
    crash: LoggingCrash | None = None
    leak: Leakage | None = None
    stale: StaleLog | None = None
    bot_trip: BotFilterTrip | None = None
    effects: tuple[MetricEffect, ...] = field(default=())
    contention: LicenceContention | None = None
    bucketing: BucketSharing | None = None

    @property
    def status(self) -> str:
        return "running" if self.stop is None else "stopped"

    def planted(self, as_of: datetime) -> tuple[PlantedProblem, ...]:
        """The answer-key entries of this experiment's faults and effects."""
        faults = (self.skew, self.crash, self.leak, self.stale, self.bot_trip, *self.effects,
                  self.contention, self.bucketing)
        return tuple(f.planted(self.experiment_id, as_of) for f in faults if f is not None)


def _d(day: int, hour: int = 10) -> datetime:
    return datetime(2026, 11, day, hour, 0, tzinfo=UTC)


_HALF = (0.5, 0.5)
_THIRD = 1.0 / 3.0

#: The demo's experiments (all live but one), in registry order.
EXPERIMENTS: tuple[ExperimentSpec, ...] = (
    ExperimentSpec(
        "quick-borrow-button", "One-tap borrow button on title pages", "lending-team",
        ("control", "treatment"), (PhaseSpec(_d(5), _HALF),), 4000,
        bot_trip=BotFilterTrip("treatment", 0.06),
    ),
    ExperimentSpec(
        "offline-download-prompt", "Prompt to download loans for offline reading", "offline-team",
        ("control", "treatment"), (PhaseSpec(_d(8), _HALF),), 2000,
        crash=LoggingCrash("treatment", {"platform": "android"}, 0.25, _d(18, 14)),
    ),
    ExperimentSpec(
        "reader-font-size", "Larger default font size in the reader", "reader-team",
        ("control", "treatment"), (PhaseSpec(_d(6), _HALF),), 1500,
        leak=Leakage(0.03),
    ),
    ExperimentSpec(
        "audiobook-sample-ramp", "Five-minute audiobook samples before borrowing", "audio-team",
        ("control", "treatment"),
        (PhaseSpec(_d(4), (0.95, 0.05)), PhaseSpec(_d(11), (0.80, 0.20)), PhaseSpec(_d(18), _HALF)),
        2500,
    ),
    ExperimentSpec(
        "hold-queue-reminder", "Reminder when a held title is about to become available",
        "notifications-team", ("control", "email", "push"),
        (PhaseSpec(_d(12), (0.5, 0.25, 0.25)),), 3000,
    ),
    ExperimentSpec(
        "due-date-nudge", "Nudge two days before a loan is due", "notifications-team",
        ("control", "treatment"), (PhaseSpec(_d(9), _HALF),), 1200,
        stale=StaleLog(30.0),
    ),
    ExperimentSpec(
        "kids-corner-'lesefüchse'", "Lesefüchse picture-book corner for young readers", "kids-team",
        ("control", "treatment"), (PhaseSpec(_d(14), _HALF),), 1000,
    ),
    ExperimentSpec(
        "search-autocomplete", "Title and author suggestions while typing a search", "discovery-team",
        ("control", "suggest"), (PhaseSpec(_d(10), _HALF),), 1800,
    ),
    ExperimentSpec(
        "dark-mode-reader", "Dark theme by default in the reader", "reader-team",
        ("control", "dark"), (PhaseSpec(_d(13), _HALF),), 2200,
        effects=(MetricEffect(
            "page_renders", "render_ms", "dark", 0.09, "guardrail",
            "Page render time per page view is 9% higher for dark-variant units after assignment.",
        ),),
    ),
    ExperimentSpec(
        "author-follow", "Follow an author to hear about new titles", "discovery-team",
        ("control", "treatment"), (PhaseSpec(_d(16), _HALF),), 1400,
    ),
    ExperimentSpec(
        "shelf-carousel", "Recommendation carousel on the home shelf", "discovery-team",
        ("control", "treatment"), (PhaseSpec(_d(7), _HALF),), 2400,
        effects=(MetricEffect(
            "reading_sessions", "minutes", "treatment", 0.06, "effect",
            "Reading minutes per unit are a real 6% higher for treatment units after assignment.",
        ),),
    ),
    ExperimentSpec(
        "night-reading-timer", "Sleep timer for night-time reading", "reader-team",
        ("control", "dim-screen", "chapter-stop"),
        (PhaseSpec(_d(17), (_THIRD, _THIRD, 1.0 - 2 * _THIRD)),), 1600,
    ),
    ExperimentSpec(
        "holiday-banner", "Seasonal reading-challenge banner on the home shelf", "growth-team",
        ("control", "treatment"), (PhaseSpec(_d(3), _HALF),), 3000,
        stop=DEMO_AS_OF - timedelta(days=10),
        skew=AllocationSkew((0.56, 0.44)),
    ),
    ExperimentSpec(
        "reading-streak-badge", "Badge for reading on consecutive days", "engagement-team",
        ("control", "treatment"), (PhaseSpec(_d(8), _HALF),), 6000,
        effects=(MetricEffect(
            "reading_sessions", "minutes", "treatment", 0.15, "novelty",
            "Reading minutes are 15% higher for treatment units on days 0-2 after assignment, then the "
            "effect fades to about 1% by day 14 (a novelty effect).",
            fade_days=2.5, long_run_lift=0.01, hold_days=3.0,
        ),),
    ),
    ExperimentSpec(
        "reader-swipe-pages", "Swipe gestures to turn pages in the reader", "reader-team",
        ("control", "treatment"), (PhaseSpec(_d(6), _HALF),), 7000,
        effects=(MetricEffect(
            "reading_sessions", "minutes", "treatment", -0.12, "novelty",
            "Reading minutes of treatment units are 12% lower at first, while patrons learn the gestures, "
            "then rise towards +14% (about +10% by day 6; a primacy or learning effect).",
            fade_days=3.0, long_run_lift=0.14,
        ),),
    ),
    ExperimentSpec(
        "licence-queue-reminder", "Reminder to collect a held title the moment a licence frees up",
        "notifications-team", ("control", "treatment"),
        (PhaseSpec(_d(11), (0.9, 0.1)), PhaseSpec(_d(15), (0.75, 0.25)), PhaseSpec(_d(19), _HALF)), 3000,
        contention=LicenceContention("treatment", 0.6),
    ),
    ExperimentSpec(
        "title-page-reviews", "Patron reviews on title pages", "discovery-team",
        ("control", "treatment"), (PhaseSpec(_d(15), _HALF),), 2000,
        bucketing=BucketSharing("review-after-return", follows=False),
    ),
    ExperimentSpec(
        "review-after-return", "Prompt to review a title after returning it", "discovery-team",
        ("control", "treatment"), (PhaseSpec(_d(18), _HALF),), 2000,
        bucketing=BucketSharing("title-page-reviews", follows=True),
    ),
)


# --------------------------------------------------------------------------- helpers


def _secs(dt: datetime) -> int:
    return int(dt.timestamp())


def _to_ts(secs: np.ndarray) -> np.ndarray:
    return np.asarray(secs, dtype=np.int64).astype("datetime64[s]").astype("datetime64[us]")


def _rng(seed: int, tag: str) -> np.random.Generator:
    return np.random.default_rng([seed, zlib.crc32(tag.encode("utf-8"))])


def _intensity(hour_starts: np.ndarray) -> np.ndarray:
    """Relative arrival intensity of each UTC hour (mean 1 over a week)."""
    hour = (hour_starts // 3600) % 24
    dow = (hour_starts // 86400 + 3) % 7  # 1970-01-01 was a Thursday; Monday = 0
    return _HOURLY_REL[hour] * np.where(dow >= 5, WEEKEND_FACTOR, 1.0) / _WEEK_MEAN


def _hour_grid(t0: int, t1: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Hour cells covering ``[t0, t1)``: cell start, cell length (s), intensity."""
    if t1 <= t0:
        empty = np.zeros(0, dtype=np.int64)
        return empty, empty, np.zeros(0)
    hs = np.arange(t0 - t0 % 3600, t1, 3600, dtype=np.int64)
    lo = np.maximum(hs, t0)
    length = np.minimum(hs + 3600, t1) - lo
    return lo, length, _intensity(hs)


def _arrivals(rng: np.random.Generator, t0: int, t1: int, daily: float) -> np.ndarray:
    """Sorted arrival times (int s) of a seasonal Poisson process on ``[t0, t1)``."""
    lo, length, inten = _hour_grid(t0, t1)
    counts = rng.poisson(daily / 24.0 * inten * length / 3600.0)
    cell = np.repeat(np.arange(lo.size), counts)
    return np.sort(lo[cell] + (rng.random(cell.size) * length[cell]).astype(np.int64))


def _seasonal_times(rng: np.random.Generator, n: int, t0: int, t1: int) -> np.ndarray:
    """``n`` times (int s) on ``[t0, t1)`` drawn from the seasonal intensity."""
    lo, length, inten = _hour_grid(t0, t1)
    w = inten * length
    cell = rng.choice(lo.size, size=n, p=w / w.sum())
    return lo[cell] + (rng.random(n) * length[cell]).astype(np.int64)


@dataclass(frozen=True)
class _Population:
    ids: np.ndarray          # object array of unit ids
    segments: dict[str, np.ndarray]  # column -> int8 codes
    bot: np.ndarray          # bool
    activity: np.ndarray     # mean 1, heterogeneous
    error_prone: np.ndarray  # mean 1, most near 0

    @property
    def n(self) -> int:
        return self.ids.size


def _population(seed: int, n: int = N_PATRONS) -> _Population:
    rng = _rng(seed, "population")
    ids = np.array([f"p{i:07d}" for i in range(1, n + 1)], dtype=object)
    segments = {
        "platform": rng.choice(len(PLATFORMS), size=n, p=PLATFORM_P).astype(np.int8),
        "region": rng.choice(len(REGIONS), size=n, p=REGION_P).astype(np.int8),
        "patron_type": rng.choice(len(PATRON_TYPES), size=n, p=PATRON_TYPE_P).astype(np.int8),
    }
    bot = rng.random(n) < BOT_SHARE
    activity = rng.gamma(0.9, 1.0 / 0.9, size=n)
    error_prone = rng.gamma(0.25, 4.0, size=n)
    return _Population(ids, segments, bot, activity, error_prone)


def _validate(specs: tuple[ExperimentSpec, ...], as_of: datetime) -> None:
    """Raise ConfigError on an inconsistent experiment spec."""
    seen: set[str] = set()
    for s in specs:
        eid = s.experiment_id
        if eid in seen:
            raise ConfigError(f"demo experiment id {eid!r} is used twice")
        seen.add(eid)
        nv = len(s.variants)
        if nv < 2 or len(set(s.variants)) != nv:
            raise ConfigError(f"demo experiment {eid!r} needs two or more distinct variants")
        if not s.phases:
            raise ConfigError(f"demo experiment {eid!r} has no phases")
        starts = [p.start for p in s.phases]
        if any(a >= b for a, b in zip(starts, starts[1:])):
            raise ConfigError(f"demo experiment {eid!r} has phases out of time order")
        if starts[-1] >= as_of or (s.stop is not None and s.stop <= starts[-1]):
            raise ConfigError(f"demo experiment {eid!r} has a phase starting after its end")
        weight_sets = [p.weights for p in s.phases] + ([s.skew.weights] if s.skew else [])
        for w in weight_sets:
            if len(w) != nv or min(w) < 0 or abs(sum(w) - 1.0) > 1e-9:
                raise ConfigError(f"demo experiment {eid!r} has weights that do not match its variants")
        if s.contention is not None and not (0 < s.contention.advantage < 1):
            raise ConfigError(f"demo experiment {eid!r} has a licence contention advantage outside (0, 1)")
        if s.bucketing is not None and s.bucketing.follows:
            partner = next((p for p in specs if p.experiment_id == s.bucketing.partner), None)
            if partner is None or partner.experiment_id not in seen or len(partner.variants) != nv:
                raise ConfigError(f"demo experiment {eid!r} follows the buckets of {s.bucketing.partner!r}, "
                                  "which must come earlier and have as many variants")
        for f in (s.crash, s.bot_trip, *s.effects, s.contention):
            if f is not None and f.variant not in s.variants:
                raise ConfigError(f"demo experiment {eid!r} has a fault on unknown variant {f.variant!r}")
        if s.crash is not None and any(
            k not in _SEGMENT_COLUMNS or v not in _SEGMENT_COLUMNS[k] for k, v in s.crash.segment.items()
        ):
            raise ConfigError(f"demo experiment {eid!r} has an unknown crash segment {s.crash.segment!r}")
        for e in s.effects:
            if (e.table, e.column) not in {("reading_sessions", "minutes"), ("page_renders", "render_ms")}:
                raise ConfigError(
                    f"demo experiment {eid!r} has an effect on unsupported {e.table}.{e.column}")


# --------------------------------------------------------------------------- assignments


@dataclass(frozen=True)
class _ExperimentRows:
    unit: np.ndarray           # patron index per row
    variant: np.ndarray        # variant index per row
    time: np.ndarray           # int s per row
    keep_filtered: np.ndarray  # bool per row
    first_unit: np.ndarray     # patron index per assigned unit
    first_variant: np.ndarray  # variant index per assigned unit
    first_time: np.ndarray     # int s of each unit's first assignment


def _experiment_rows(spec: ExperimentSpec, pop: _Population, seed: int, as_of: datetime) -> _ExperimentRows:
    """Simulate one experiment's exposure log (raw rows plus the filtered-stage mask)."""
    rng = _rng(seed, "experiment:" + spec.experiment_id)
    t_start = _secs(spec.phases[0].start)
    t_end = _secs(min(as_of, spec.stop or as_of, spec.stale.onset(as_of) if spec.stale else as_of))

    # New units: seasonal arrivals, each a patron not yet in the experiment.
    t_first = _arrivals(rng, t_start, t_end, spec.daily_units)
    n = t_first.size
    if n > pop.n:
        raise ConfigError(f"demo experiment {spec.experiment_id!r} needs more units than the population")
    units = rng.permutation(pop.n)[:n]

    # Variant: multinomial with the (actual) weights of the phase in force.
    phase_starts = np.array([_secs(p.start) for p in spec.phases], dtype=np.int64)
    phase = np.searchsorted(phase_starts, t_first, side="right") - 1
    weights = np.array([spec.skew.weights if spec.skew else p.weights for p in spec.phases])
    cum = np.cumsum(weights, axis=1)[:, :-1]
    variant = (rng.random(n)[:, None] >= cum[phase]).sum(axis=1).astype(np.int8)

    # Logging crash: some new units of the variant/segment after onset are never logged.
    if spec.crash is not None:
        c = spec.crash
        hit = (variant == spec.variants.index(c.variant)) & (t_first >= _secs(c.onset))
        for col, value in c.segment.items():
            hit &= pop.segments[col][units] == _SEGMENT_COLUMNS[col].index(value)
        lost = hit & (rng.random(n) < c.share)
        t_first, units, variant = t_first[~lost], units[~lost], variant[~lost]
        n = t_first.size

    # Return visits: geometric count, exponential gaps, same variant.
    k = rng.geometric(RETURN_P, size=n) - 1
    owner = np.repeat(np.arange(n), k)
    cs = np.cumsum(rng.exponential(RETURN_GAP_DAYS * 86400.0, size=owner.size))
    before = np.concatenate(([0.0], cs))[np.cumsum(k) - k]
    t_ret = t_first[owner] + (cs - before[owner]).astype(np.int64)
    ok = t_ret < t_end
    owner, t_ret = owner[ok], t_ret[ok]
    row_unit = [np.arange(n), owner]
    row_var = [variant, variant[owner]]
    row_t = [t_first, t_ret]

    # Leakage: a share of units later also gets rows in another variant.
    if spec.leak is not None:
        nv = len(spec.variants)
        leaker = np.flatnonzero((rng.random(n) < spec.leak.share) & (t_end - t_first >= 2))
        m = rng.geometric(0.6, size=leaker.size)
        lu = np.repeat(leaker, m)
        span = (t_end - t_first[lu]).astype(np.float64)
        t_leak = t_first[lu] + 1 + (rng.random(lu.size) * (span - 1)).astype(np.int64)
        other = (variant[leaker] + 1 + rng.integers(0, nv - 1, size=leaker.size)) % nv
        row_unit.append(lu)
        row_var.append(np.repeat(other, m).astype(np.int8))
        row_t.append(t_leak)

    # Filtered stage: global bots, plus units the variant makes look like bots.
    flagged = pop.bot[units].copy()
    if spec.bot_trip is not None:
        b = spec.bot_trip
        flagged |= (variant == spec.variants.index(b.variant)) & (rng.random(n) < b.share)

    local = np.concatenate(row_unit)
    t_all = np.concatenate(row_t)
    order = np.lexsort((local, t_all))
    local = local[order]
    return _ExperimentRows(
        unit=units[local],
        variant=np.concatenate(row_var)[order],
        time=t_all[order],
        keep_filtered=~flagged[local],
        first_unit=units,
        first_variant=variant,
        first_time=t_first,
    )


def _registry(specs: tuple[ExperimentSpec, ...]) -> pd.DataFrame:
    recs = []
    for s in specs:
        for i, p in enumerate(s.phases):
            end = s.phases[i + 1].start if i + 1 < len(s.phases) else s.stop
            for j, (v, w) in enumerate(zip(s.variants, p.weights)):
                recs.append((s.experiment_id, s.title, s.owner, s.status, i + 1,
                             p.start.replace(tzinfo=None),
                             end.replace(tzinfo=None) if end is not None else None,
                             v, float(w), j == 0))
    cols = [c for c, _ in TABLE_SCHEMAS["experiments"]]
    df = pd.DataFrame.from_records(recs, columns=cols)
    df["phase"] = df["phase"].astype(np.int32)
    for c in ("phase_start", "phase_end"):
        df[c] = pd.to_datetime(df[c]).astype("datetime64[us]")
    df["is_control"] = df["is_control"].astype(bool)
    return df


def _assignment_frame(pop: _Population, exp_ids: np.ndarray, var_names: np.ndarray,
                      exp_code: np.ndarray, var_code: np.ndarray, unit: np.ndarray,
                      t: np.ndarray) -> pd.DataFrame:
    data = {
        "unit_id": pop.ids[unit],
        "experiment_id": exp_ids[exp_code],
        "variant": var_names[var_code],
        "assigned_at": _to_ts(t),
    }
    for col, values in _SEGMENT_COLUMNS.items():
        data[col] = np.array(values, dtype=object)[pop.segments[col][unit]]
    return pd.DataFrame(data)


# --------------------------------------------------------------------------- events


def _apply_effects(values: np.ndarray, unit: np.ndarray, t: np.ndarray, effects: list,
                   n_patrons: int) -> np.ndarray:
    """Multiply ``values`` by each effect's multiplier for events after first assignment.

    ``effects`` holds ``(MetricEffect, patron indices, first-assignment times)``.
    """
    out = values.astype(np.float64, copy=True)
    first = np.full(n_patrons, np.iinfo(np.int64).max, dtype=np.int64)
    for eff, units, t_first in effects:
        first[:] = np.iinfo(np.int64).max
        first[units] = t_first
        after = t >= first[unit]
        age_days = (t[after] - first[unit[after]]) / 86400.0
        decay = np.exp(-np.maximum(age_days - eff.hold_days, 0.0) / eff.fade_days) if eff.fade_days else 1.0
        out[after] *= 1.0 + eff.long_run_lift + (eff.lift - eff.long_run_lift) * decay
    return out


def _event_tables(pop: _Population, seed: int, t0: int, t1: int,
                  effects: dict[tuple[str, str], list],
                  contention: list | None = None) -> dict[str, pd.DataFrame]:
    """Metric event tables for the whole population on ``[t0, t1)``."""
    rng = _rng(seed, "events")
    days = (t1 - t0) / 86400.0
    platform = pop.segments["platform"]

    def draw(rate: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        unit = np.repeat(np.arange(pop.n), rng.poisson(rate * days))
        t = _seasonal_times(rng, unit.size, t0, t1)
        order = np.lexsort((unit, t))
        return unit[order], t[order]

    out: dict[str, pd.DataFrame] = {}
    u, t = draw(0.06 * pop.activity)
    minutes = rng.lognormal(np.log(14.0), 0.85, size=u.size)
    minutes = _apply_effects(minutes, u, t, effects.get(("reading_sessions", "minutes"), []), pop.n)
    out["reading_sessions"] = pd.DataFrame(
        {"unit_id": pop.ids[u], "started_at": _to_ts(t), "minutes": np.round(minutes, 2)})

    u, t = draw(0.06 * pop.activity)
    base_ms = np.array([240.0, 190.0, 310.0])[platform[u]]
    render = base_ms * rng.lognormal(0.0, 0.4, size=u.size)
    render = _apply_effects(render, u, t, effects.get(("page_renders", "render_ms"), []), pop.n)
    out["page_renders"] = pd.DataFrame(
        {"unit_id": pop.ids[u], "rendered_at": _to_ts(t), "render_ms": np.round(render, 1)})

    u, t = draw(0.012 * pop.activity)
    out["loans"] = pd.DataFrame(
        {"unit_id": pop.ids[u], "loaned_at": _to_ts(t), "cancelled": rng.random(u.size) < 0.06})

    u, t = draw(0.004 * pop.error_prone)
    codes = np.array(ERROR_CODES, dtype=object)[rng.choice(len(ERROR_CODES), size=u.size, p=ERROR_CODE_P)]
    out["app_errors"] = pd.DataFrame({"unit_id": pop.ids[u], "occurred_at": _to_ts(t), "error_code": codes})

    u, t = draw(0.08 * pop.activity)
    wait = rng.lognormal(np.log(30.0), 0.6, size=u.size)
    wait = _apply_contention(wait, u, t, contention or [], pop.n)
    out["holds"] = pd.DataFrame({"unit_id": pop.ids[u], "placed_at": _to_ts(t), "wait_hours": np.round(wait, 1)})
    return out


def _apply_contention(wait: np.ndarray, unit: np.ndarray, t: np.ndarray, contention: list,
                      n_patrons: int) -> np.ndarray:
    """Scale hold waits of an experiment's units after their first assignment (:class:`LicenceContention`).

    ``contention`` holds ``(ExperimentSpec, _ExperimentRows)`` pairs.
    """
    out = wait.astype(np.float64, copy=True)
    for spec, r in contention:
        c = spec.contention
        first = np.full(n_patrons, np.iinfo(np.int64).max, dtype=np.int64)
        var = np.full(n_patrons, -1, dtype=np.int64)
        first[r.first_unit] = r.first_time
        var[r.first_unit] = r.first_variant
        after = t >= first[unit]
        starts = np.array([_secs(p.start) for p in spec.phases], dtype=np.int64)
        phase = np.clip(np.searchsorted(starts, t[after], side="right") - 1, 0, len(spec.phases) - 1)
        share = 1.0 - np.array([p.weights[0] for p in spec.phases])[phase]
        treated = var[unit[after]] == spec.variants.index(c.variant)
        a = c.advantage
        out[after] *= np.where(treated, 1.0 - a * (1.0 - share) ** 2, 1.0 + a * share * (1.0 - share))
    return out


def _follow_buckets(r: _ExperimentRows, partner: _ExperimentRows, n_patrons: int) -> _ExperimentRows:
    """Give the units shared with ``partner`` the partner's variant index (:class:`BucketSharing`)."""
    lookup = np.full(n_patrons, -1, dtype=np.int64)
    lookup[partner.first_unit] = partner.first_variant
    row_v = lookup[r.unit]
    first_v = lookup[r.first_unit]
    return replace(r, variant=np.where(row_v >= 0, row_v, r.variant).astype(r.variant.dtype),
                   first_variant=np.where(first_v >= 0, first_v, r.first_variant).astype(r.first_variant.dtype))


# --------------------------------------------------------------------------- public


def _build(specs: tuple[ExperimentSpec, ...], seed: int, as_of: datetime
           ) -> tuple[dict[str, pd.DataFrame], DemoSummary]:
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
        raise ConfigError(f"demo seed must be a non-negative integer, got {seed!r}")
    seed = int(seed)
    _validate(specs, as_of)
    t_begin = time.perf_counter()
    pop = _population(seed)

    exp_ids = np.array([s.experiment_id for s in specs], dtype=object)
    var_names_list: list[str] = []
    parts = []
    effects: dict[tuple[str, str], list] = {}
    contention: list = []
    rows_by_id: dict[str, _ExperimentRows] = {}
    for code, s in enumerate(specs):
        r = _experiment_rows(s, pop, seed, as_of)
        if s.bucketing is not None and s.bucketing.follows:
            r = _follow_buckets(r, rows_by_id[s.bucketing.partner], pop.n)
        rows_by_id[s.experiment_id] = r
        if s.contention is not None:
            contention.append((s, r))
        offset = len(var_names_list)
        var_names_list.extend(s.variants)
        parts.append((code, offset, r))
        for e in s.effects:
            vi = s.variants.index(e.variant)
            sel = r.first_variant == vi
            effects.setdefault((e.table, e.column), []).append((e, r.first_unit[sel], r.first_time[sel]))
    var_names = np.array(var_names_list, dtype=object)

    exp_code = np.concatenate([np.full(r.unit.size, c, dtype=np.int16) for c, _, r in parts])
    var_code = np.concatenate([(r.variant + off).astype(np.int16) for _, off, r in parts])
    unit = np.concatenate([r.unit for _, _, r in parts])
    t = np.concatenate([r.time for _, _, r in parts])
    keep = np.concatenate([r.keep_filtered for _, _, r in parts])

    tables: dict[str, pd.DataFrame] = {"experiments": _registry(specs)}
    tables["assignments"] = _assignment_frame(pop, exp_ids, var_names, exp_code, var_code, unit, t)
    tables["assignments_filtered"] = (
        tables["assignments"].loc[keep].reset_index(drop=True)
    )

    first_start = min(s.phases[0].start for s in specs)
    ev_start = (first_start - timedelta(days=PRE_PERIOD_DAYS)).replace(hour=0, minute=0, second=0)
    tables.update(_event_tables(pop, seed, _secs(ev_start), _secs(as_of), effects, contention))

    planted = tuple(p for s in specs for p in s.planted(as_of))
    problem_exps = {p.experiment for p in planted if p.check != "effect"}
    live = tuple(s.experiment_id for s in specs if s.status == "running")
    summary = DemoSummary(
        path=None,
        as_of=as_of,
        live=live,
        ended=tuple(s.experiment_id for s in specs if s.status != "running"),
        healthy=tuple(e for e in live if e not in problem_exps),
        planted=planted,
        rows={name: int(len(df)) for name, df in tables.items()},
    )
    logger.debug("demo tables built in %.2f s: %s", time.perf_counter() - t_begin, summary.rows)
    return tables, summary


def demo_tables(seed: int = DEMO_SEED) -> tuple[dict[str, pd.DataFrame], DemoSummary]:
    """Build every demo table in memory.

    Parameters
    ----------
    seed : int, optional
        Non-negative seed; the same seed gives identical frames.

    Returns
    -------
    tables : dict of str to pandas.DataFrame
        One frame per table of :data:`TABLE_SCHEMAS`, columns in schema order;
        timestamps are naive UTC ``datetime64[us]``.
    summary : DemoSummary
        Experiment lists, the planted-problem answer key and row counts
        (``summary.path`` is None).

    Raises
    ------
    ConfigError
        If ``seed`` is not a non-negative integer, or :data:`EXPERIMENTS` is
        inconsistent.

    Notes
    -----
    Each experiment uses its own random stream derived from ``seed`` and its id,
    so adding an experiment leaves the others' rows unchanged. Metric events are
    drawn for the whole patron population, including patrons in no experiment.
    The planted-problem strengths (e.g. 4 % versus 1 % bot removal) are
    expectations; realised shares vary with the seed.

    References
    ----------
    .. [1] NumPy developers, "Random sampling (numpy.random)": Generator,
       SeedSequence and the Poisson, geometric, exponential, gamma and
       lognormal samplers, https://numpy.org/doc/stable/reference/random/
    """
    return _build(EXPERIMENTS, seed, DEMO_AS_OF)


def build_demo_warehouse(path: Path, seed: int = DEMO_SEED) -> DemoSummary:
    """Write the demo tables into a new DuckDB file.

    Parameters
    ----------
    path : pathlib.Path
        Database file to create. An existing file there is replaced, and a stale
        write-ahead log (``<path>.wal``) is removed. Missing parent folders are
        created.
    seed : int, optional
        Seed passed to :func:`demo_tables`.

    Returns
    -------
    DemoSummary
        As from :func:`demo_tables`, with ``path`` set.

    Raises
    ------
    ConfigError
        If ``path`` is a directory or ``seed`` is invalid.

    Notes
    -----
    Column types follow :data:`TABLE_SCHEMAS` exactly (explicit casts). The
    connection is closed before returning, so the same process can then open
    the file read-only.
    """
    path = Path(path)
    if path.is_dir():
        raise ConfigError(f"demo warehouse path {str(path)!r} is a directory")
    tables, summary = demo_tables(seed)
    path.parent.mkdir(parents=True, exist_ok=True)
    wal = path.with_name(path.name + ".wal")
    for p in (path, wal):
        if p.exists():
            p.unlink()
    con = duckdb.connect(str(path))
    try:
        for name, df in tables.items():
            casts = ", ".join(f'CAST("{c}" AS {sql}) AS "{c}"' for c, sql in TABLE_SCHEMAS[name])
            con.register("expwatch_demo_src", df)
            con.execute(f'CREATE TABLE "{name}" AS SELECT {casts} FROM expwatch_demo_src')
            con.unregister("expwatch_demo_src")
        con.execute("CHECKPOINT")
    finally:
        con.close()
    return replace(summary, path=path)

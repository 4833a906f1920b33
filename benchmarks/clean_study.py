"""Clean simulated studies: many sites, realistic data flow, no planted problem.

Every site runs its lottery as designed, delivers its offers, measures both arms alike
and keeps sending data up to the cutoff.  Whatever the monitoring flags on such a study
is a false alarm (or, for ``weak_first_stage``, a small site whose instrument really is
weak).  Used by ``benchmarks/false_alarms.py`` and by ``tests/test_clean_study.py``.

What varies between sites, all drawn from one ``numpy.random.default_rng(seed)``,
vectorised over participants (no loop over rows or sites):

* **accrual**: a start week in 0..5 of the season; weekly Poisson arrivals with a
  site-specific rate (log-normal, median ``median_weekly`` participants a week, about a
  fourfold range between the 10th and 90th percentile) until the cutoff;
* **design**: individual lottery at 50/50; ``share_two_to_one`` of the sites are
  designed 2:1 (treatment 2/3) and run as designed (declared in the site registry);
* **compliance**: complier share ~ Beta(11, 9) (mean 0.55, mostly 0.35-0.75),
  always-taker share ~ Beta(2, 25) (mean 0.07), the rest never-takers; constant over
  the season (monotonicity holds);
* **uptake reports**: one report per participant, 1-27 days after assignment
  (so the latest cohorts are partly unreported at the cutoff), missing for a
  site-specific 0-6% of participants in both arms alike;
* **outcomes**: one measurement 75-105 days after assignment (inside the follow-up
  window of 70-112 days), missing completely at random for a site-specific 2-20% of
  participants in both arms alike; Y = site mean ~ N(50, 5²) + 1.5 for always-takers
  - 1.5 for never-takers + CACE_s x D + N(0, sd_s²) with sd_s ~ U(8, 12);
* **effect heterogeneity**: CACE_s ~ N(``cace_mean``, ``cace_sd``²) (default 6, 1).

All numbers are invented.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import date, timedelta
from pathlib import Path

import numpy as np

OUTCOME = "score"
SEASON_START = date(2025, 1, 6)           # a Monday
SEASON_WEEKS = 30                         # the cutoff is the last day of week 30
FOLLOW_MIN, FOLLOW_MAX = 70, 112


@dataclass(frozen=True)
class CleanStudy:
    """A simulated study: its configuration, its three record tables (pyarrow) and the cutoff."""

    config: object                         # takeup.schemas.config.StudyConfig
    assignments: object                    # pyarrow.Table
    uptake: object
    outcomes: object
    as_of: date
    n_sites: int
    n_participants: int
    seed: int


def site_names(k: int) -> list[str]:
    width = max(4, len(str(k)))
    return [f"S{i + 1:0{width}d}" for i in range(k)]


def simulate_clean_study(n_sites: int, seed: int, median_weekly: float = 10.0, cace_mean: float = 6.0,
                         cace_sd: float = 1.0, share_two_to_one: float = 0.1,
                         planted_cace: dict[int, float] | None = None, season_weeks: int = SEASON_WEEKS,
                         null_first_stage: int = 0) -> CleanStudy:
    """Simulate one clean study (see the module docstring for the model).

    ``planted_cace`` (site index -> true CACE) replaces the drawn effect of a few sites:
    the one departure from "clean", for tests that need a known outlier.  ``season_weeks``
    sets the cutoff (the last day of that week).  ``null_first_stage`` (default 0): the last
    that many sites have no compliers (uptake 30% in both arms: the boundary of the null
    of ``negative_first_stage``), drawn after everything else so the other sites are unchanged.
    """
    import pyarrow as pa
    from takeup.schemas.config import FollowUp, OutcomeSpec, SiteSpec, StudyConfig

    rng = np.random.default_rng(seed)
    k = n_sites
    names = site_names(k)
    as_of = SEASON_START + timedelta(weeks=season_weeks) - timedelta(days=1)
    # --- sites
    start_week = rng.integers(0, 6, k)
    rate = median_weekly * np.exp(rng.normal(0.0, 0.55, k))
    two_to_one = rng.random(k) < share_two_to_one
    p_treat = np.where(two_to_one, 2 / 3, 0.5)
    complier = rng.beta(11, 9, k)
    always = np.minimum(rng.beta(2, 25, k), 0.95 - complier)
    no_report = rng.uniform(0.0, 0.06, k)
    missing_y = rng.uniform(0.02, 0.20, k)
    mu = rng.normal(50.0, 5.0, k)
    sd = rng.uniform(8.0, 12.0, k)
    cace = rng.normal(cace_mean, cace_sd, k)
    for i, value in (planted_cace or {}).items():
        cace[i] = value
    # --- accrual: weekly Poisson counts per site, then participants
    if null_first_stage:
        complier[k - null_first_stage:] = 0.0
        always[k - null_first_stage:] = 0.3
    weeks = np.arange(season_weeks)
    counts = rng.poisson(rate[:, None] * (weeks[None, :] >= start_week[:, None]))
    site = np.repeat(np.repeat(np.arange(k), season_weeks), counts.ravel())
    week = np.repeat(np.tile(weeks, k), counts.ravel())
    n = site.size
    day0 = np.datetime64(SEASON_START)
    assigned = day0 + (7 * week + rng.integers(0, 7, n)).astype("timedelta64[D]")
    z = rng.random(n) < p_treat[site]
    u = rng.random(n)
    is_always = u < always[site]
    is_complier = ~is_always & (u < always[site] + complier[site])
    d = is_always | (is_complier & z)
    observed = assigned + rng.integers(1, 28, n).astype("timedelta64[D]")
    reported = rng.random(n) >= no_report[site]
    measured = assigned + rng.integers(75, 106, n).astype("timedelta64[D]")
    has_y = rng.random(n) >= missing_y[site]
    never = ~is_always & ~is_complier
    y = mu[site] + 1.5 * is_always - 1.5 * never + cace[site] * d + rng.normal(0.0, 1.0, n) * sd[site]
    # --- records (dates after the cutoff are simply not sent yet)
    cutoff = np.datetime64(as_of)
    pid = pa.array(np.char.add("P", np.arange(n).astype(str)))
    site_arr = pa.array(np.array(names, dtype=object)[site])
    assignments = pa.table({"site_id": site_arr, "participant_id": pid,
                            "arm": pa.array(np.where(z, "treatment", "control")),
                            "assigned_on": pa.array(assigned, type=pa.date32())})
    keep_u = reported & (observed <= cutoff)
    uptake = pa.table({"site_id": site_arr.filter(pa.array(keep_u)), "participant_id": pid.filter(pa.array(keep_u)),
                       "observed_on": pa.array(observed[keep_u], type=pa.date32()),
                       "took_up": pa.array(d[keep_u])})
    keep_y = has_y & (measured <= cutoff)
    outcomes = pa.table({"site_id": site_arr.filter(pa.array(keep_y)), "participant_id": pid.filter(pa.array(keep_y)),
                         "outcome": pa.array(np.full(int(keep_y.sum()), OUTCOME)),
                         "measured_on": pa.array(measured[keep_y], type=pa.date32()),
                         "value": pa.array(y[keep_y])})
    sites = tuple(SiteSpec(site_id=s, allocation={"treatment": 2 / 3, "control": 1 / 3}) if t else SiteSpec(site_id=s)
                  for s, t in zip(names, two_to_one))
    config = StudyConfig(study_id=f"clean-{k}-sites", outcomes=(OutcomeSpec(name=OUTCOME, primary=True),),
                         follow_up=FollowUp(min_days=FOLLOW_MIN, max_days=FOLLOW_MAX), sites=sites)
    return CleanStudy(config=config, assignments=assignments, uptake=uptake, outcomes=outcomes, as_of=as_of,
                      n_sites=k, n_participants=int(n), seed=seed)


def write_files(study: CleanStudy, out: Path) -> list[Path]:
    """One Parquet file per record kind (assignments first); a kind with no records yet gets no file.

    (A file that names its columns but holds no records is refused at ingestion.)
    """
    import pyarrow.parquet as pq
    out.mkdir(parents=True, exist_ok=True)
    paths = []
    for kind, table in (("assignment", study.assignments), ("uptake", study.uptake), ("outcome", study.outcomes)):
        if table.num_rows == 0:
            continue
        path = out / f"clean_{kind}.parquet"
        pq.write_table(table, path)
        paths.append(path)
    return paths


def build_warehouse(study: CleanStudy, root: Path):
    """Ingest the study into a new warehouse under ``root`` and run the monitoring once.

    The pseudonymisation key must be set (``TAKEUP_ID_KEY``).  Returns (warehouse path,
    run summary).
    """
    from takeup.pipeline.ingest.many_files import ingest_paths
    from takeup.pipeline.run.stages import run_monitoring
    from takeup.pipeline.warehouse import init_warehouse
    path = root / "clean.duckdb"
    init_warehouse(path, study.config)
    reports = ingest_paths(path, write_files(study, root / "files"))
    bad = [r for r in reports if r.status != "loaded" or r.rows_quarantined]
    if bad:
        raise RuntimeError(f"clean study did not load cleanly: {bad}")
    summary = run_monitoring(path, as_of=study.as_of)
    return path, summary


def alert_shares(con, run_id: str, n_sites: int) -> dict[str, tuple[int, float]]:
    """Per rule: (sites with an active alert, share of sites); key ``any`` for any rule."""
    rows = con.execute("SELECT rule, count(DISTINCT site_id) FROM alerts WHERE run_id = $r "
                       "AND status IN ('new', 'ongoing') GROUP BY rule", {"r": run_id}).fetchall()
    out = {rule: (int(c), c / n_sites) for rule, c in rows}
    n_any = con.execute("SELECT count(DISTINCT site_id) FROM alerts WHERE run_id = $r "
                        "AND status IN ('new', 'ongoing')", {"r": run_id}).fetchone()[0]
    out["any"] = (int(n_any), n_any / n_sites)
    return out

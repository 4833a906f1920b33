"""False-alarm and coverage figures of the alert rules and intervals (pasted into the README).

    .venv/bin/python benchmarks/calibration.py [--reps 2000]

Known-truth simulations with fixed seeds; the data-generating processes are the ones the tests
use (imported from ``tests/``, so the README figures and the tests' checks come from one
computation), with more replications.  Prints a markdown table per check.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

import numpy as np
from scipy import stats

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from takeup.pipeline.stats.estimators.wald import wald_estimates  # noqa: E402
from takeup.pipeline.stats.significance import benjamini_hochberg  # noqa: E402
from tests.test_cluster_randomisation import clean_sites, srm_alerts  # noqa: E402
from tests.test_drift_calibration import START, bound, season, study_rates  # noqa: E402
from tests.test_drift_clusters import season_rates, shift_delays  # noqa: E402
from takeup.pipeline.run.trend_rows import detect_drift  # noqa: E402
from tests.test_small_clusters import TRUE_CACE, simulate_sites  # noqa: E402


def coverage_table(reps: int) -> str:
    lines = ["| clusters G | CACE normal | CACE t(G-1) | ITT normal | ITT t(G-1) | complier share normal | "
             "complier share t(G-1) |", "|---:|---:|---:|---:|---:|---:|---:|"]
    for G in (4, 6, 8, 12, 40):
        m, cm = simulate_sites(G, reps, np.random.default_rng(900 + G))
        est = wald_estimates(m, cm, min_clusters_per_arm=2)
        # truths: CACE 2; ITT and complier share by their large-sample values in the same design
        big_m, big_cm = simulate_sites(G, 4000, np.random.default_rng(99))
        big = wald_estimates(big_m, big_cm, min_clusters_per_arm=2)
        truths = {"cace": TRUE_CACE, "itt": float(np.mean(big.itt)), "complier_share": float(np.mean(big.complier_share))}
        z = stats.norm.ppf(0.975)
        cells = []
        for q in ("cace", "itt", "complier_share"):
            b, se = getattr(est, q), getattr(est, f"{q}_se")
            lo, hi = getattr(est, f"{q}_ci_low"), getattr(est, f"{q}_ci_high")
            ok = np.isfinite(se)
            t = truths[q]
            cells += [f"{np.mean(np.abs(b[ok] - t) <= z * se[ok]):.3f}", f"{np.mean((lo[ok] <= t) & (t <= hi[ok])):.3f}"]
        lines.append(f"| {G} | " + " | ".join(cells) + " |")
    mc = np.sqrt(0.95 * 0.05 / reps)
    lines.append(f"\n{reps} replications per row (Monte Carlo SE of a coverage near 0.95: {mc:.3f}); seed 900 + G.")
    return "\n".join(lines)


def srm_table(n_sites: int) -> str:
    clean = clean_sites(np.random.default_rng(2015), n_sites)
    lines = ["| counted unit | level | false-alert share of clean sites |", "|---|---:|---:|"]
    for unit, label in (("cluster", "clusters (the randomised unit)"), ("individual", "participants (before)")):
        for level in (0.001, 0.05):
            rate = len(srm_alerts(clean, unit, level)) / n_sites
            lines.append(f"| {label} | {level:g} | {rate:.4f} |")
    lines.append(f"\n{n_sites} clean cluster-randomised sites, 10-20 clusters each (fair coin per cluster), "
                 "cluster-size CV 0.5; seed 2015.")
    return "\n".join(lines)


def negative_first_stage_table(reps: int) -> str:
    rng = np.random.default_rng(29)
    # 29 strong sites (share 0.6, SE 0.05) and one with true share 0 (SE 0.05), per run
    z_null = rng.normal(0, 1, reps)
    z_strong = rng.normal(12, 1, (reps, 29))
    p = np.column_stack([stats.norm.cdf(z_strong), stats.norm.cdf(z_null)])
    adj = np.vstack([benjamini_hochberg(row).p_adjusted for row in p])
    by_bh = adj[:, -1] <= 0.05
    by_f_route = (z_null < 0) & (z_null ** 2 >= 3.8416)
    return ("| rule | null site alerted (share of runs) |\n|---|---:|\n"
            f"| BH only (now) | {by_bh.mean():.4f} |\n| BH or 'negative with F >= 3.84' (before) | "
            f"{(by_bh | by_f_route).mean():.4f} |\n\n{reps} runs of 29 strong sites and one with complier share 0; "
            "seed 29.")


def drift_table(n_studies: int) -> str:
    lines = ["| season | bound 1 − exp(−N/2000) | known-level h: control / treatment | calibrated h (default): "
             "control / treatment |", "|---|---:|---:|---:|"]
    for weeks, per_arm, sd, label in ((26, 25, 0.0, "26 weeks × 25 per arm, identical sites"),
                                      (26, 25, 0.5, "26 weeks × 25 per arm, between-site logit SD 0.5"),
                                      (52, 4, 0.0, "52 weeks × 4 per arm, identical sites")):
        r = study_rates(7000 + weeks, n_studies, weeks, per_arm, sd)
        k, e = r["known_level"], r["estimated_level"]
        lines.append(f"| {label} | {bound(weeks, per_arm):.3f} | {k[0]:.3f} / {k[1]:.3f} | {e[0]:.3f} / {e[1]:.3f} |")
    lines.append(f"\nShare of site x arm charts with at least one false alarm in the season; {n_studies} studies of "
                 f"30 clean sites ({30 * n_studies} charts per arm), baseline 4 weeks, shrunk level; seeds 7000 + weeks.")
    return "\n".join(lines)


def drift_delay_table(n_sites: int) -> str:
    from datetime import timedelta
    frame = season(np.random.default_rng(8), n_sites, 26, 25, shift_week=8)
    lines = ["| limit | detected by week 26 | mean delay (cohorts of 25 after the change, incl. the first) |",
             "|---|---:|---:|"]
    for cal in ("known_level", "estimated_level"):
        d = detect_drift(frame, 4, 3.0, 2000.0, calibration=cal)
        ctrl = np.array(d.arm) == "control"
        first = [p for p, c in zip(d.first_signal_period, ctrl) if c and p is not None and p >= START + timedelta(weeks=8)]
        delay = np.array([(p - (START + timedelta(weeks=8))).days // 7 + 1 for p in first])
        lines.append(f"| {cal} | {np.asarray(d.signalled)[ctrl].mean():.3f} | {delay.mean():.2f} |")
    lines.append(f"\n{n_sites} sites, control uptake 8% with odds x 3 from week 8 (the planted shift of the design); seed 8.")
    return "\n".join(lines)


def cluster_drift_table(n_studies: int) -> str:
    r = season_rates(2015, n_studies)
    n = 30 * n_studies
    lines = ["| chart | documented rate: control / treatment | false-alarm share: control / treatment |",
             "|---|---:|---:|"]
    for unit, label in (("cluster", "cluster-level cohort summaries, Rao–Scott (now)"),
                        ("participant", "participants as independent (before)")):
        b, a = r[unit]["bound"], r[unit]["alarm"]
        lines.append(f"| {label} | {b[0]:.3f} / {b[1]:.3f} | {a[0]:.3f} / {a[1]:.3f} |")
    lines.append(f"\nShare of site x arm charts with at least one false alarm in a 26-week season; documented rate "
                 f"= mean of 1 − exp(−N/2000) over the charts, N = monitored participants (effective participants "
                 f"for the cluster summaries); {n_studies} studies of 30 clean cluster-randomised sites ({n} charts "
                 "per arm), 10–20 clusters per site (fair coin), cluster-size CV 0.5 (mean 25), entry in a random "
                 "week, enrolment over 1–4 weeks, cluster effect SD 1.0 on the logit scale; seed 2015.")
    return "\n".join(lines)


def cluster_delay_table(n_sites: int) -> str:
    r = shift_delays(8, n_sites)
    d = r["delays"]
    return ("| detected by week 52 | mean delay (effective participants) | documented ARL1 at the charts' limits "
            "| mean effective entry cohort |\n|---:|---:|---:|---:|\n"
            f"| {r['detected']:.3f} | {d.mean():.1f} (MC SE {d.std(ddof=1) / np.sqrt(d.size):.1f}) | "
            f"{r['documented'].mean():.1f} | {r['cohort'].mean():.1f} |\n\n"
            f"{n_sites} sites of 40 clusters (mean 40, cluster logit SD 0.5), control odds × 3 from week 20 of 52; "
            "seed 8.")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--reps", type=int, default=2000)
    ap.add_argument("--only", choices=["cluster-drift"], default=None, help="print one section only")
    args = ap.parse_args()
    if args.only == "cluster-drift":
        print("### Drift charts under cluster randomisation\n")
        print(cluster_drift_table(20))
        print()
        print(cluster_delay_table(100))
        return
    print("### Coverage of 95% intervals under cluster randomisation (CR1)\n")
    print(coverage_table(args.reps))
    print("\n### Sample-ratio check under cluster randomisation\n")
    print(srm_table(5000))
    print("\n### negative_first_stage: one null site among 30\n")
    print(negative_first_stage_table(20000))
    print("\n### Drift charts: season false alarms with an estimated in-control level\n")
    print(drift_table(20))
    print()
    print(drift_delay_table(300))
    print("\n### Drift charts under cluster randomisation\n")
    print(cluster_drift_table(20))
    print()
    print(cluster_delay_table(100))


if __name__ == "__main__":
    main()

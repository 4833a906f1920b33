"""The demo scenario: an invented evening numeracy course offered by lottery.

A regional adult-learning service offers places in an evening numeracy
course by lottery at 31 learning centres.  Each week for 12 weeks every
centre runs a lottery among that week's applicants (designed treatment
share 0.5).  Uptake = attended at least one session, reported the week
after the offer.  Outcome = numeracy score from an assessment about 12
weeks after the offer.  Centres upload one file per record kind and week;
the whole scenario is 24 upload weeks (12 of lotteries, then the
assessments of the last cohorts).  Everything is generated from a fixed
seed; the planted problems are listed in ``PLANTED`` and in
``sample_warehouse/README.md``.  One more centre (``STRATIFIED_CENTRE``) changes its
lottery odds halfway while its later cohorts score higher: an estimation trap that
stratifying by lottery week avoids (no alert rule is meant to fire there).

All numbers here are invented.  Nothing refers to a real programme.
"""

from __future__ import annotations

import json
import shutil
from dataclasses import dataclass
from datetime import date, timedelta
from pathlib import Path

import numpy as np
import pandas as pd

__all__ = ["DemoManifest", "generate_demo", "PLANTED", "DEMO_SEED", "DEMO_START", "demo_as_of", "CENTRES",
           "STRATIFIED_CENTRE", "STRATIFIED_NOTE"]

DEMO_SEED = 20260601
DEMO_START = date(2026, 6, 1)          # Monday of lottery week 1
N_LOTTERY_WEEKS = 12
N_UPLOAD_WEEKS = 24
ASSESSMENT_WEEKS = 12
TRUE_CACE = 6.0                        # numeracy points for compliers, clean centres

_NAMES = [
    "Alder Street", "Brookfield", "Canal Wharf", "Dunmore Library", "Eastgate", "Fernhill",
    "Granary Yard", "Hollins Park", "Ironbridge", "Juniper Court", "Kestrel Lane", "Larkrise",
    "Millpond", "Northmoor", "Orchard Row", "Pennyworth", "Quarry Bank", "Ravensholt",
    "Saltmarsh", "Tanners Hall", "Upper Weald", "Vinegar Hill", "Westcombe", "Yewdale",
    "Ashby Cross", "Bellhouse", "Copperfield", "Dovecote", "Elmstead", "Foxley Green",
]
_REGIONS = ["North", "South", "East", "West", "Central"]
#: the centre whose weekly lotteries change odds (weekly lotteries declared as strata)
STRATIFIED_CENTRE = "C31"
CENTRES: tuple[str, ...] = tuple(f"C{i:02d}" for i in range(1, 31)) + (STRATIFIED_CENTRE,)
_NAMES.append("Greystone")
#: lottery odds of the stratified centre: 0.5 for six weeks, then 0.8 when a second classroom opens
_C31_ODDS = {w: (0.5 if w <= 6 else 0.8) for w in range(1, 13)}
_C31_LATER_COHORT_SHIFT = 10.0         # later cohorts score 10 points higher, programme or not
STRATIFIED_NOTE = ("C31 runs its weekly lotteries at 50/50 for six weeks, then at 80/20 when a second classroom "
                   "opens, and its later cohorts score about 10 points higher whatever the offer; the weekly "
                   "lotteries are declared as strata (stratum = lottery week, assignment_probability given), so "
                   "its stratified CACE recovers the true 6 points while the unstratified one is far off")

#: centre -> (rule the later monitoring should raise, what was planted)
PLANTED: dict[str, tuple[str, str]] = {
    "C07": ("control_uptake_drift",
            "controls increasingly get places: control uptake climbs from about 8% to about 55% from lottery week 7"),
    "C12": ("treatment_uptake_drift",
            "offers stop being delivered from lottery week 7: treated uptake falls to the control level"),
    "C18": ("sample_ratio_mismatch", "the lottery ran at 70/30 instead of the designed 50/50"),
    "C23": ("weak_first_stage", "very few participants (about two applicants a week)"),
    "C05": ("differential_missing_outcomes",
            "about 45% of control outcomes missing against about 4% of treated"),
    "C27": ("stale_site", "stops uploading after upload week 8"),
    "C14": ("outlier_site", "the course works very differently: true complier effect 24 points instead of 6"),
}
MALFORMED_NOTE = ("malformed rows: C03 week 2 assignments (misspelt arm, impossible date, a missing identifier, "
                  "an unknown centre C99); C09 week 15 outcomes (non-numeric and infinite scores); "
                  "C21 week 4 uptake (an unreadable uptake value and a line with an extra field)")
DUPLICATE_NOTE = ("C16 sends its upload-week 7 uptake file (lottery week 6) twice, "
                  "the second time under another name")


@dataclass(frozen=True)
class DemoManifest:
    root: Path
    config_path: Path
    files: tuple[Path, ...]          # in upload order
    as_of: date
    n_participants: int


def demo_as_of() -> date:
    """Cutoff of the final demo run: the Sunday ending the last upload week."""
    return DEMO_START + timedelta(weeks=N_UPLOAD_WEEKS) - timedelta(days=1)


def _config_toml() -> str:
    lines = [
        'study_id = "evening-numeracy-2026"',
        'randomisation_unit = "individual"',
        'uptake_definition = "ever_by_cutoff"',
        'covariates = ["age", "baseline_score"]',
        "",
        "[allocation]",
        "treatment = 0.5",
        "control = 0.5",
        "",
        "[[outcomes]]",
        'name = "numeracy_score"',
        "primary = true",
        'unit = "points"',
        'direction = "higher_is_better"',
        "",
        "[follow_up]",
        "min_days = 70",
        "max_days = 112",
        'rule = "last"',
        "",
        "[estimation]",
        "adjust_covariates = true",
        "",
        "[schedule]",
        'cron = "0 6 * * 1"',
        'timezone = "UTC"',
        "",
        "[publish]                     # copies for dashboards, relative to the warehouse's folder",
        'parquet_dir = "published"',
        'duckdb_file = "dashboard.duckdb"',
        "",
    ]
    for i, c in enumerate(CENTRES):
        lines += ["[[sites]]", f'site_id = "{c}"', f'name = "{_NAMES[i]} Learning Centre"',
                  f'group = "{_REGIONS[i % len(_REGIONS)]}"', ""]
    return "\n".join(lines)


def _simulate(rng: np.random.Generator) -> pd.DataFrame:
    rows = []
    for ci, centre in enumerate(CENTRES):
        if centre == STRATIFIED_CENTRE:
            continue                      # simulated on its own stream below
        base_size = 2 if centre == "C23" else int(rng.choice([22, 28, 34, 40, 48]))
        share = 0.7 if centre == "C18" else 0.5
        effect = 24.0 if centre == "C14" else TRUE_CACE + rng.normal(0, 0.8)
        for week in range(1, N_LOTTERY_WEEKS + 1):
            n = max(1, int(rng.poisson(base_size)))
            n_t = int(round(n * share)) if centre != "C18" else int(rng.binomial(n, share))
            z = np.zeros(n, dtype=int)
            z[rng.permutation(n)[:n_t]] = 1
            # compliance types: always-taker 8%, complier 62%, never-taker 30%
            u = rng.random(n)
            always = u < 0.08
            complier = (u >= 0.08) & (u < 0.70)
            d = np.where(always, 1, np.where(complier, z, 0))
            if centre == "C07" and week >= 7:
                # controls increasingly find a place: a growing share of control compliers get in
                leak = min(0.25 + 0.1 * (week - 7), 0.75)
                d = np.where((z == 0) & complier & (rng.random(n) < leak), 1, d)
            if centre == "C12" and week >= 7:
                d = np.where((z == 1) & complier, 0, d)   # offers never reach people
            age = np.clip(rng.normal(38, 11, n), 18, 80).round()
            baseline = np.clip(rng.normal(48, 9, n) + 4 * always - 3 * (~always & ~complier), 0, 100).round(1)
            score = baseline + 1.8 + rng.normal(0, 6, n) + effect * d
            offered_on = DEMO_START + timedelta(weeks=week - 1, days=int(rng.integers(0, 3)))
            for j in range(n):
                rows.append((centre, week, offered_on, int(z[j]), int(d[j]), age[j], baseline[j], score[j]))
    df = pd.DataFrame(rows, columns=["site_id", "week", "assigned_on", "z", "d", "age", "baseline_score", "score"])
    df["participant_id"] = [f"{s}-{rng_id:06d}" for s, rng_id in zip(df.site_id, rng.permutation(len(df)) + 100000)]
    # missingness of outcomes: 4% at random; C05 loses 45% of controls
    miss = rng.random(len(df)) < 0.04
    c05c = (df.site_id == "C05") & (df.z == 0)
    miss |= c05c & (rng.random(len(df)) < 0.43)
    df["outcome_missing"] = miss
    df["measured_on"] = [a + timedelta(weeks=ASSESSMENT_WEEKS, days=int(k)) for a, k in
                         zip(df.assigned_on, rng.integers(0, 5, len(df)))]
    df["stratum"] = None
    df["assignment_probability"] = np.nan
    return pd.concat([df, _simulate_stratified(np.random.default_rng([DEMO_SEED, 31]))], ignore_index=True)


def _simulate_stratified(rng: np.random.Generator) -> pd.DataFrame:
    """C31: weekly lotteries whose odds rise from 0.5 to 0.8 in week 7; later cohorts score higher.

    Its own random stream, so the other centres' data do not change.
    """
    rows = []
    for week in range(1, N_LOTTERY_WEEKS + 1):
        n = int(rng.poisson(80))
        p = _C31_ODDS[week]
        z = np.zeros(n, dtype=int)
        z[rng.permutation(n)[:int(round(n * p))]] = 1
        u = rng.random(n)
        always = u < 0.08
        complier = (u >= 0.08) & (u < 0.70)
        d = np.where(always, 1, np.where(complier, z, 0))
        age = np.clip(rng.normal(38, 11, n), 18, 80).round()
        later = _C31_LATER_COHORT_SHIFT if week >= 7 else 0.0
        baseline = np.clip(rng.normal(48, 9, n) + 4 * always - 3 * (~always & ~complier), 0, 100).round(1)
        score = baseline + 1.8 + later + rng.normal(0, 6, n) + TRUE_CACE * d
        offered_on = DEMO_START + timedelta(weeks=week - 1, days=int(rng.integers(0, 3)))
        for j in range(n):
            rows.append((STRATIFIED_CENTRE, week, offered_on, int(z[j]), int(d[j]), age[j], baseline[j], score[j],
                         f"week-{week:02d}", p))
    df = pd.DataFrame(rows, columns=["site_id", "week", "assigned_on", "z", "d", "age", "baseline_score", "score",
                                     "stratum", "assignment_probability"])
    df["participant_id"] = [f"{STRATIFIED_CENTRE}-{k:06d}" for k in rng.permutation(len(df)) + 100000]
    df["outcome_missing"] = rng.random(len(df)) < 0.04
    df["measured_on"] = [a + timedelta(weeks=ASSESSMENT_WEEKS, days=int(k)) for a, k in
                         zip(df.assigned_on, rng.integers(0, 5, len(df)))]
    return df


def _took_up_tokens(centre: str) -> tuple[str, str]:
    i = int(centre[1:])
    return [("1", "0"), ("yes", "no"), ("true", "false")][i % 3]


def _write(frame: pd.DataFrame, path: Path, parquet: bool) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    if parquet:
        path = path.with_suffix(".parquet")
        frame.to_parquet(path, index=False)
    else:
        frame.to_csv(path, index=False)
    return path


def generate_demo(root: Path | str, seed: int = DEMO_SEED, replace: bool = False) -> DemoManifest:
    """Write the demo's study config and weekly upload files under ``root``.

    ``root/study.toml`` and ``root/incoming/week_NN/<centre>_<kind>.csv|parquet``
    (centres of the East region send Parquet).  An existing ``root/incoming`` or
    ``root/study.toml`` is replaced only with ``replace=True`` (else FileExistsError).
    Returns the files in upload order.
    """
    root = Path(root)
    incoming = root / "incoming"
    config_path = root / "study.toml"
    present = [p for p in (incoming, config_path) if p.exists() or p.is_symlink()]
    if present and not replace:
        raise FileExistsError(f"the demo would replace {', '.join(map(str, present))}; pass replace=True")
    if incoming.is_symlink():
        incoming.unlink()
    elif incoming.exists():
        shutil.rmtree(incoming)
    root.mkdir(parents=True, exist_ok=True)
    config_path.unlink(missing_ok=True)
    config_path.write_text(_config_toml())
    rng = np.random.default_rng(seed)
    df = _simulate(rng)
    files: list[Path] = []
    regions = {c: _REGIONS[i % len(_REGIONS)] for i, c in enumerate(CENTRES)}
    for upload in range(1, N_UPLOAD_WEEKS + 1):
        upload_day = DEMO_START + timedelta(weeks=upload - 1, days=4)   # Fridays
        wdir = incoming / f"week_{upload:02d}"
        for centre in CENTRES:
            if centre == "C27" and upload > 8:
                continue
            parquet = regions[centre] == "East"
            site = df[df.site_id == centre]
            if upload <= N_LOTTERY_WEEKS:
                a = site[site.week == upload]
                out = pd.DataFrame({"site_id": a.site_id, "participant_id": a.participant_id,
                                    "arm": np.where(a.z == 1, "treatment", "control"),
                                    "assigned_on": [d.isoformat() for d in a.assigned_on],
                                    "age": a.age, "baseline_score": a.baseline_score})
                if centre == STRATIFIED_CENTRE:
                    out["stratum"] = a.stratum.to_numpy()
                    out["assignment_probability"] = a.assignment_probability.to_numpy()
                if centre == "C03" and upload == 2:
                    out = out.astype(object)
                    out.iloc[0, 2] = "treatmnt"
                    out.iloc[1, 3] = "2026-06-31"
                    out.iloc[2, 1] = ""
                    out.iloc[3, 0] = "C99"
                files.append(_write(out, wdir / f"{centre}_assignment.csv", parquet))
            if 2 <= upload <= N_LOTTERY_WEEKS + 1:
                u = site[site.week == upload - 1]
                yes, no = _took_up_tokens(centre)
                out = pd.DataFrame({"site_id": u.site_id, "participant_id": u.participant_id,
                                    "observed_on": upload_day.isoformat(),
                                    "took_up": np.where(u.d == 1, yes, no)})
                path = wdir / f"{centre}_uptake.csv"
                if centre == "C21" and upload == 4 and not parquet:
                    text = out.to_csv(index=False).splitlines()
                    text[2] = text[2].rsplit(",", 1)[0] + ",perhaps"
                    text[3] = text[3] + ",unexpected"
                    path.parent.mkdir(parents=True, exist_ok=True)
                    path.write_text("\n".join(text) + "\n")
                    files.append(path)
                else:
                    files.append(_write(out, path, parquet))
                if centre == "C16" and upload == 7:
                    dup = shutil.copyfile(files[-1], wdir / "C16_uptake_resend.csv")
                    files.append(Path(dup))
            if upload > ASSESSMENT_WEEKS:
                o = site[(site.week == upload - ASSESSMENT_WEEKS) & ~site.outcome_missing]
                out = pd.DataFrame({"site_id": o.site_id, "participant_id": o.participant_id,
                                    "outcome": "numeracy_score",
                                    "measured_on": [d.isoformat() for d in o.measured_on],
                                    "value": o.score.round(1)})
                if centre == "C09" and upload == 15:
                    out = out.astype(object)
                    out.iloc[0, 4] = "n/a"
                    out.iloc[1, 4] = "inf"
                if len(out):
                    files.append(_write(out, wdir / f"{centre}_outcome.csv", parquet))
    manifest = {"seed": seed, "as_of": demo_as_of().isoformat(), "participants": int(len(df)),
                "planted": {k: {"rule": v[0], "what": v[1]} for k, v in PLANTED.items()},
                "stratified": {STRATIFIED_CENTRE: STRATIFIED_NOTE}}
    (root / "incoming" / "manifest.json").write_text(json.dumps(manifest, indent=2))
    return DemoManifest(root=root, config_path=config_path, files=tuple(files), as_of=demo_as_of(),
                        n_participants=int(len(df)))


def generate_late_files(root: Path | str, seed: int = DEMO_SEED) -> tuple[Path, ...]:
    """Files that repair two planted problems after the fact (for the alert lifecycle).

    * C05 sends the control-arm outcomes it had not reported (late assessment returns);
    * C27 sends its backlog: the assignments, uptake and outcomes of the weeks it missed.

    Written under ``root/incoming/late/``; ingesting them and re-running resolves the
    ``differential_missing_outcomes`` alert of C05 and the ``stale_site`` alert of C27.
    """
    root = Path(root)
    rng = np.random.default_rng(seed)
    df = _simulate(rng)
    late = root / "incoming" / "late"
    late.mkdir(parents=True, exist_ok=True)
    files = []
    c05 = df[(df.site_id == "C05") & df.outcome_missing & (df.z == 0)]
    out = pd.DataFrame({"site_id": c05.site_id, "participant_id": c05.participant_id, "outcome": "numeracy_score",
                        "measured_on": [d.isoformat() for d in c05.measured_on], "value": c05.score.round(1)})
    files.append(_write(out, late / "C05_outcome_late.csv", False))
    c27 = df[df.site_id == "C27"]
    back = c27[c27.week >= 8]       # uploads 9.. never arrived: lottery weeks 9-12 and the uptake of week 8 on
    a = back[back.week >= 9]
    files.append(_write(pd.DataFrame({"site_id": a.site_id, "participant_id": a.participant_id,
                                      "arm": np.where(a.z == 1, "treatment", "control"),
                                      "assigned_on": [d.isoformat() for d in a.assigned_on],
                                      "age": a.age, "baseline_score": a.baseline_score}),
                        late / "C27_assignment_backlog.csv", False))
    yes, no = _took_up_tokens("C27")
    files.append(_write(pd.DataFrame({"site_id": back.site_id, "participant_id": back.participant_id,
                                      "observed_on": [(d + timedelta(days=7)).isoformat() for d in back.assigned_on],
                                      "took_up": np.where(back.d == 1, yes, no)}),
                        late / "C27_uptake_backlog.csv", False))
    o = c27[~c27.outcome_missing]
    files.append(_write(pd.DataFrame({"site_id": o.site_id, "participant_id": o.participant_id,
                                      "outcome": "numeracy_score",
                                      "measured_on": [d.isoformat() for d in o.measured_on],
                                      "value": o.score.round(1)}),
                        late / "C27_outcome_backlog.csv", False))
    return tuple(files)

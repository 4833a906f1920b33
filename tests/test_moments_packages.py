"""Regional warehouses sharing only aggregates: moments packages and the central run from them.

The reference is the run on one warehouse holding every site (the demo, built once per session):
the demo's upload files are split by region into three warehouses, each writes a package, and the
central run from the three packages must equal the one-warehouse run.  Sums over disjoint sets of
sites add exactly, so the only differences allowed are floating-point reassociation: 1e-9 absolute
or relative on every numeric cell; alerts (rule, site, status, messages) must be identical.
"""

from __future__ import annotations

import io
import json
import os
import shutil
import zipfile
from dataclasses import fields, replace
from datetime import date, timedelta
from pathlib import Path

import duckdb
import numpy as np
import pandas as pd
import pytest

from takeup.pipeline.cli import main
from takeup.pipeline.demo import demo_as_of
from takeup.pipeline.errors import PackageError
from takeup.pipeline.ingest.many_files import ingest_paths
from takeup.pipeline.run.central_run import run_from_packages
from takeup.pipeline.run.inputs import CENTRAL_STATE_FIELDS, RunInputs, collect_aggregates, new_run_context
from takeup.pipeline.run.moments_package import (MomentsPackage, aggregate_fields, merge_packages,
                                                 package_from_warehouse, read_package, write_package)
from takeup.pipeline.run.pooled_inputs import write_warehouse_package
from takeup.pipeline.run.reproduce import reproduce_run
from takeup.pipeline.run.stages import run_monitoring
from takeup.pipeline.warehouse import connect, init_warehouse
from takeup.schemas.config import load_config, parse_config
from tests.conftest import TEST_KEY

COMPARED = ("site_estimates", "pooled_estimates", "site_influence", "uptake_trends", "alerts", "complier_profile",
            "subgroup_tests", "precision_forecasts")
#: the demo's five regions in three regional warehouses
WAREHOUSE_OF_REGION = {"North": "north", "South": "north", "East": "east", "West": "west", "Central": "west"}


@pytest.fixture(scope="module")
def regions(demo_warehouse, tmp_path_factory):
    """One warehouse with every centre (the demo) and three regional ones holding the same files between them."""
    root = tmp_path_factory.mktemp("regions")
    manifest = demo_warehouse["manifest"]
    config = load_config(manifest.config_path)
    files: dict[str, list[Path]] = {name: [] for name in set(WAREHOUSE_OF_REGION.values())}
    for f in manifest.files:
        centre = f.name.split("_")[0]
        files[WAREHOUSE_OF_REGION[config.site_group(centre)]].append(f)
    old = os.environ.get("TAKEUP_ID_KEY")
    os.environ["TAKEUP_ID_KEY"] = TEST_KEY
    paths = {}
    try:
        for name, fs in sorted(files.items()):
            path = root / f"{name}.duckdb"
            init_warehouse(path, config)
            ingest_paths(path, fs)
            paths[name] = path
        central = root / "central.duckdb"
        init_warehouse(central, config)
    finally:
        if old is None:
            os.environ.pop("TAKEUP_ID_KEY", None)
        else:
            os.environ["TAKEUP_ID_KEY"] = old
    single = root / "single.duckdb"
    shutil.copy(demo_warehouse["path"], single)
    packages = {}
    for name, path in paths.items():
        out = root / "packages" / f"{name}.zip"
        write_warehouse_package(path, demo_as_of(), out)
        packages[name] = out
    return {"root": root, "config": config, "regional": paths, "central": central, "single": single,
            "packages": packages, "files": files}


def _tables(path: Path, run_id: str) -> dict[str, pd.DataFrame]:
    con = duckdb.connect(str(path), read_only=True)
    try:
        out = {}
        for t in COMPARED:
            df = con.execute(f'SELECT * EXCLUDE (run_id) FROM "{t}" WHERE run_id = $r', {"r": run_id}).df()
            df = df.drop(columns=[c for c in ("first_seen_run_id", "last_seen_run_id") if c in df.columns])
            keys = [c for c in df.columns if df[c].dtype == object]
            out[t] = df.sort_values(keys).reset_index(drop=True) if len(df) else df
        return out
    finally:
        con.close()


def _assert_same(single: dict, central: dict) -> None:
    for t in COMPARED:
        a, b = single[t], central[t]
        assert len(a) == len(b) and len(a) > 0 or t in ("subgroup_tests", "precision_forecasts"), t
        if t == "alerts":
            # identical: the same rules, sites, statuses, severities and messages; the numbers behind them
            # to 1e-9 (DuckDB's parallel sums of doubles are reproducible only to rounding)
            text = [c for c in a.columns if not pd.api.types.is_float_dtype(a[c])]
            pd.testing.assert_frame_equal(a[text], b[text], check_exact=True, obj=t)
            pd.testing.assert_frame_equal(a, b, check_exact=False, rtol=1e-9, atol=1e-9, obj=t)
        else:
            pd.testing.assert_frame_equal(a, b, check_exact=False, rtol=1e-9, atol=1e-9, obj=t)


@pytest.fixture(scope="module")
def two_runs(regions):
    """Two consecutive runs on one warehouse and two central runs from the packages (sequence state, alert lifecycle)."""
    single = [run_monitoring(regions["single"], as_of=demo_as_of()) for _ in range(2)]
    paths = list(regions["packages"].values())
    central = [run_from_packages(regions["central"], paths) for _ in range(2)]
    return single, central


def test_central_run_from_three_packages_equals_one_warehouse(regions, two_runs):
    single, central = two_runs
    assert central[0].n_sites == single[0].n_sites >= 30
    for s, c in zip(single, central):
        assert c.status == "ok"
        _assert_same(_tables(regions["single"], s.run_id), _tables(regions["central"], c.run_id))


def test_second_run_carries_sequences_and_alert_lifecycle(regions, two_runs):
    single, central = two_runs
    t = _tables(regions["central"], central[1].run_id)
    assert (t["site_estimates"]["look"].dropna() == 2).all()        # the running intersection continued
    assert set(t["alerts"]["status"]) <= {"ongoing", "resolved"} and len(t["alerts"])


def test_runs_row_records_package_hashes_and_fingerprint(regions, two_runs):
    single, central = two_runs
    con = duckdb.connect(str(regions["central"]), read_only=True)
    try:
        src, fp, nb = con.execute("SELECT moments_sources, input_fingerprint, n_batches FROM runs WHERE run_id = $r",
                                  {"r": central[0].run_id}).fetchone()
        stored = con.execute("SELECT package_sha256 FROM moments_packages").fetchall()
    finally:
        con.close()
    sources = json.loads(src)
    hashes = {read_package(p).sha256 for p in regions["packages"].values()}
    assert {s["package_sha256"] for s in sources} == hashes == {r[0] for r in stored}
    con = duckdb.connect(str(regions["single"]), read_only=True)
    try:
        fp1, nb1 = con.execute("SELECT input_fingerprint, n_batches FROM runs WHERE run_id = $r",
                               {"r": single[0].run_id}).fetchone()
    finally:
        con.close()
    # the same files, split over three warehouses: the same batches, the same fingerprint
    assert (fp, nb) == (fp1, nb1)


def test_reproduce_central_run_from_stored_packages(regions, two_runs):
    _, central = two_runs
    for run in central:
        r = reproduce_run(regions["central"], run.run_id)
        assert r.identical, (r.max_abs_diff, r.mismatched)


def _assert_same_aggregates(a_inputs, b_inputs, *, exact: bool) -> None:
    for name in aggregate_fields():
        a, b = getattr(a_inputs, name), getattr(b_inputs, name)
        if isinstance(a, pd.DataFrame):
            pd.testing.assert_frame_equal(a.reset_index(drop=True), b.reset_index(drop=True), check_exact=exact,
                                          rtol=1e-12, obj=name)
        elif name == "adjusted":
            assert a.keys() == b.keys() and a
            for o in a:
                assert a[o].sites == b[o].sites
                for x, y in ((a[o].cross.cross, b[o].cross.cross), (a[o].scores.meat_iv, b[o].scores.meat_iv),
                             (a[o].scores.meat_fs, b[o].scores.meat_fs)):
                    if exact:
                        np.testing.assert_array_equal(x, y)
                    else:
                        # two aggregations of the same rows: DuckDB's parallel sums may add in another order,
                        # so entries that are zero in exact arithmetic differ by rounding (~1e-16 of the scale)
                        np.testing.assert_allclose(x, y, rtol=1e-10, atol=1e-10 * float(np.max(np.abs(x))))
        else:
            assert a == b, name


def test_package_round_trip_keeps_every_frame(regions):
    """A package read back carries exactly what was written (dtypes included), and that is what the
    warehouse's own aggregation returns (up to the summation order of a parallel scan)."""
    path = regions["regional"]["east"]
    con = connect(path, read_only=True)
    try:
        ctx = new_run_context(regions["config"], as_of=demo_as_of())
        direct = collect_aggregates(con, ctx)
        pkg = package_from_warehouse(con, ctx, "east")
    finally:
        con.close()
    out = regions["root"] / "roundtrip.zip"
    write_package(pkg, out)
    back = read_package(out).aggregates
    _assert_same_aggregates(pkg.aggregates, back, exact=True)
    _assert_same_aggregates(direct, pkg.aggregates, exact=False)


def test_every_run_input_is_carried_or_central():
    """A field added to RunInputs is either carried by packages or named as central state (guard)."""
    names = {f.name for f in fields(RunInputs)}
    assert set(aggregate_fields()) | set(CENTRAL_STATE_FIELDS) == names
    assert not set(aggregate_fields()) & set(CENTRAL_STATE_FIELDS)


# ----------------------------------------------------------------------------- no participant-level data
def _participant_values(regions, name: str) -> tuple[set[str], set[float]]:
    """Identifiers (raw and pseudonymised) and non-integer participant-level values of one region."""
    con = duckdb.connect(str(regions["regional"][name]), read_only=True)
    try:
        keys = {str(r[0]) for r in con.execute("SELECT participant_key FROM assignments UNION "
                                          "SELECT participant_key FROM outcome_measurements").fetchall()}
        values = {r[0] for r in con.execute("SELECT value FROM outcome_measurements UNION "
                                            "SELECT value FROM assignment_covariates").fetchall()
                  if r[0] is not None and np.isfinite(r[0]) and r[0] != round(r[0])}
    finally:
        con.close()
    raw = set()
    for f in regions["files"][name]:
        frame = pd.read_parquet(f) if f.suffix == ".parquet" else pd.read_csv(f, dtype=str, on_bad_lines="skip")
        if "participant_id" in frame.columns:
            raw |= {str(v) for v in frame["participant_id"].dropna() if str(v)}
    return keys | raw, values


def _scan(frame: pd.DataFrame, identifiers: set[str], values: set[float]) -> list[str]:
    """Problems in one part: an identifier in any cell, or a column that looks participant-level.

    A participant-level column matches participant values on (nearly) every row; an aggregate matches
    one only by coincidence or in a one-participant cell (allowed: the package is confidential), so a
    column fails when more than a quarter of its non-integer values are participant values.
    """
    problems = []
    for col in frame.columns:
        s = frame[col]
        if s.dtype == object or str(s.dtype).startswith(("str", "string")):
            cells = {str(v) for v in s.dropna()}
            hit = cells & identifiers
            if hit:
                problems.append(f"{col}: identifier {sorted(hit)[0]!r}")
            long_ids = [i for i in identifiers if len(i) >= 16]
            if any(i in c for c in cells if len(c) >= 16 for i in long_ids):
                problems.append(f"{col}: a pseudonym inside a cell")
        elif pd.api.types.is_numeric_dtype(s) and not pd.api.types.is_bool_dtype(s):
            x = s.dropna().to_numpy(dtype=float)
            if len(x) and np.abs(x).max() > 1e18:       # pseudonyms are 128-bit integers; no sum comes near
                problems.append(f"{col}: values of the size of a pseudonym")
            frac = x[x != np.round(x)]
            if len(frac) >= 4 and np.isin(frac, list(values)).mean() > 0.25:
                problems.append(f"{col}: participant-level values")
    return problems


def test_packages_hold_no_participant_level_data(regions):
    for name, path in regions["packages"].items():
        identifiers, values = _participant_values(regions, name)
        assert identifiers and values
        with zipfile.ZipFile(path) as z:
            manifest_text = z.read("manifest.json").decode()
            parts = [n for n in z.namelist() if n.endswith(".parquet")]
            assert parts and not any(i in manifest_text for i in identifiers if len(i) >= 6)
            for part in parts:
                frame = pd.read_parquet(io.BytesIO(z.read(part)))
                assert not _scan(frame, identifiers, values), (name, part, _scan(frame, identifiers, values))
        assert "CONFIDENTIAL" in json.loads(manifest_text)["confidentiality"]


def test_the_scan_catches_participant_level_columns(regions):
    """The scan above can fail: a frame with keys or outcome values per participant is caught."""
    identifiers, values = _participant_values(regions, "north")
    key = sorted(i for i in identifiers if len(i) >= 16)[0]
    assert _scan(pd.DataFrame({"site_id": ["C01"], "k": [key]}), identifiers, values)
    assert _scan(pd.DataFrame({"k": [float(int(key))]}), identifiers, values)
    rows = pd.DataFrame({"y": sorted(values)[:50]})
    assert _scan(rows, identifiers, values)


# ----------------------------------------------------------------------------- refusals
def _rezip(src: Path, dst: Path, change: dict[str, bytes]) -> Path:
    with zipfile.ZipFile(src) as zin, zipfile.ZipFile(dst, "w") as zout:
        for n in zin.namelist():
            zout.writestr(n, change.get(n, zin.read(n)))
        for n in set(change) - set(zin.namelist()):
            zout.writestr(n, change[n])
    return dst


def test_tampered_part_is_refused(regions, tmp_path, capsys):
    src = regions["packages"]["north"]
    with zipfile.ZipFile(src) as z:
        frame = pd.read_parquet(io.BytesIO(z.read("parts/moments.parquet")))
    frame.loc[0, "sum_y"] += 1.0
    buf = io.BytesIO()
    frame.to_parquet(buf, index=False)
    bad = _rezip(src, tmp_path / "north.zip", {"parts/moments.parquet": buf.getvalue()})
    with pytest.raises(PackageError, match=r"parts/moments.parquet does not match its SHA-256"):
        read_package(bad)
    code = main(["run", "--warehouse", str(regions["central"]), "--from-moments", str(bad),
                 str(regions["packages"]["east"]), str(regions["packages"]["west"])])
    assert code == 2 and "does not match its SHA-256" in capsys.readouterr().err


def test_unlisted_file_in_package_is_refused(regions, tmp_path):
    bad = _rezip(regions["packages"]["north"], tmp_path / "x.zip", {"parts/extra.parquet": b"x"})
    with pytest.raises(PackageError, match="not listed in manifest.json"):
        read_package(bad)


def test_other_study_or_config_is_refused_with_the_difference_named(regions, tmp_path, key_env):
    paths = list(regions["packages"].values())
    other = regions["config"].model_copy(update={"follow_up": regions["config"].follow_up.model_copy(
        update={"max_days": 200})})
    central = tmp_path / "c.duckdb"
    init_warehouse(central, other)
    days = regions["config"].follow_up.max_days
    with pytest.raises(PackageError, match=rf"follow_up\.max_days is {days} there and 200 here") as e:
        run_from_packages(central, paths)
    assert "another configuration" in str(e.value)
    study = tmp_path / "s.duckdb"
    init_warehouse(study, regions["config"].model_copy(update={"study_id": "another_study"}))
    with pytest.raises(PackageError, match="from study 'evening-numeracy-2026', this warehouse's study is 'another_study'"):
        run_from_packages(study, paths)
    con = duckdb.connect(str(central), read_only=True)
    assert con.execute("SELECT count(*) FROM runs").fetchone()[0] == 0          # nothing written
    con.close()


def test_overlap_twice_and_as_of_mismatch_are_refused(regions, tmp_path):
    p = regions["packages"]
    whole = tmp_path / "whole.zip"
    write_warehouse_package(regions["single"], demo_as_of(), whole)
    with pytest.raises(PackageError, match=r"site 'C\d\d' is in both"):
        run_from_packages(regions["central"], [p["north"], whole])
    with pytest.raises(PackageError, match="given twice"):
        run_from_packages(regions["central"], [p["north"], p["north"]])
    early = tmp_path / "east_early.zip"
    write_warehouse_package(regions["regional"]["east"], demo_as_of() - timedelta(days=7), early)
    with pytest.raises(PackageError, match="different as-of dates"):
        run_from_packages(regions["central"], [p["north"], early, p["west"]])
    with pytest.raises(PackageError, match="as of .* the run as of"):
        run_from_packages(regions["central"], list(p.values()), as_of=demo_as_of() + timedelta(days=1))


def test_periods_on_different_grids_are_refused(regions):
    """With periods other than weekly the grid starts at the first assignment: packages must share it."""
    cfg = regions["config"].model_copy(update={"trends": regions["config"].trends.model_copy(
        update={"period_days": 14})})
    pkgs = []
    for name in ("north", "east"):
        con = connect(regions["regional"][name], read_only=True)
        try:
            pkgs.append(package_from_warehouse(con, new_run_context(cfg, as_of=demo_as_of()), name))
        finally:
            con.close()
    a, b = pkgs
    shifted = replace(b, aggregates=replace(b.aggregates, cohort_origin=a.aggregates.cohort_origin + timedelta(days=3)))
    with pytest.raises(PackageError, match="14-day trend periods lie on different grids"):
        merge_packages([a, shifted], cfg)
    aligned = replace(b, aggregates=replace(b.aggregates, cohort_origin=a.aggregates.cohort_origin + timedelta(days=14)))
    merged, _ = merge_packages([a, aligned], cfg)
    assert merged.cohort_origin == a.aggregates.cohort_origin


# ----------------------------------------------------------------------------- command line
def test_cli_moments_run_and_reproduce(regions, tmp_path, capsys, key_env):
    config = regions["config"]
    central = tmp_path / "central.duckdb"
    init_warehouse(central, config)
    outdir = tmp_path / "pk"
    for name, path in regions["regional"].items():
        code = main(["moments", "--warehouse", str(path), "--as-of", demo_as_of().isoformat(),
                     "--out", str(outdir / f"{name}.zip")])
        assert code == 0
        assert oct((outdir / f"{name}.zip").stat().st_mode & 0o777) == "0o600"
    out = capsys.readouterr().out
    assert "CONFIDENTIAL" in out and "SHA-256" in out
    assert main(["moments", "--warehouse", str(regions["regional"]["north"]), "--as-of",
                 demo_as_of().isoformat(), "--out", str(outdir / "north.zip")]) == 2       # no silent overwrite
    assert "--force" in capsys.readouterr().err
    assert main(["run", "--warehouse", str(central), "--from-moments", str(outdir)]) in (0, 1)
    run_id = capsys.readouterr().out.split()[1].rstrip(":")
    assert main(["reproduce", "--warehouse", str(central), "--run", run_id]) == 0
    assert "reproduced exactly" in capsys.readouterr().out


# ----------------------------------------------------------------------------- shards (in process)
def test_sharded_study_in_process_equals_one_warehouse(regions, tmp_path, key_env):
    shards = [{"path": str(p), "name": n} for n, p in sorted(regions["regional"].items())]
    cfg = parse_config({**json.loads(regions["config"].canonical_json()), "shards": shards})
    central = tmp_path / "central.duckdb"
    init_warehouse(central, cfg)
    s = run_monitoring(central, as_of=demo_as_of())
    one = run_monitoring(regions["single"], as_of=demo_as_of())
    a, b = _tables(regions["single"], one.run_id), _tables(central, s.run_id)
    a["site_estimates"] = a["site_estimates"].drop(columns="look")     # the single warehouse has earlier runs
    b["site_estimates"] = b["site_estimates"].drop(columns="look")
    for t in ("pooled_estimates",):
        a[t], b[t] = a[t].drop(columns="look"), b[t].drop(columns="look")
    for t in ("site_estimates", "pooled_estimates", "site_influence", "uptake_trends"):
        pd.testing.assert_frame_equal(a[t], b[t], check_exact=False, rtol=1e-9, atol=1e-9, obj=t)
    assert reproduce_run(central, s.run_id).identical

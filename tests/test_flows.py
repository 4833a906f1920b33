"""Prefect flows: orchestrated run equals the in-process run; Dask runner; ingest flow; serve registration.

One ``prefect_test_harness`` for the whole session (its API start takes ~10-20 s).
"""

from __future__ import annotations

import os
from datetime import date

import duckdb
import numpy as np
import pandas as pd
import pytest

pytest.importorskip("prefect")

from tests.conftest import TEST_KEY  # noqa: E402

RESULT_TABLES = ("site_estimates", "complier_profile", "pooled_estimates", "subgroup_tests", "site_influence",
                 "uptake_trends", "alerts")
AS_OF = date(2026, 5, 31)


@pytest.fixture(scope="session")
def prefect_api():
    from prefect.testing.utilities import prefect_test_harness
    with prefect_test_harness(server_startup_timeout=180):
        yield


def _site_files(root, seed=7, n_sites=6, n=160):
    """Small invented multi-site study with covariates (simulation, known truth CACE = 3)."""
    rng = np.random.default_rng(seed)
    rows_a, rows_u, rows_o = [], [], []
    for s in range(n_sites):
        site = f"S{s + 1}"
        z = rng.permutation(np.arange(n) % 2)
        typ = rng.random(n)
        d = np.where(typ < 0.1, 1, np.where(typ < 0.75, z, 0))
        x = rng.normal(40, 10, n).round(1)
        y = 10 + 0.1 * x + 3.0 * d + rng.normal(0, 2, n)
        for i in range(n):
            pid = f"{site}-{i}"
            assigned = date(2026, 3, 2 + (i % 4) * 7)
            rows_a.append((site, pid, "treatment" if z[i] else "control", assigned.isoformat(), x[i]))
            rows_u.append((site, pid, date(2026, 4, 1).isoformat(), int(d[i])))
            rows_o.append((site, pid, "score", date(2026, 5, 20).isoformat(), round(float(y[i]), 3)))
    a = root / "assign.csv"
    pd.DataFrame(rows_a, columns=["site_id", "participant_id", "arm", "assigned_on", "age"]).to_csv(a, index=False)
    u = root / "uptake.csv"
    pd.DataFrame(rows_u, columns=["site_id", "participant_id", "observed_on", "took_up"]).to_csv(u, index=False)
    o = root / "outcome.csv"
    pd.DataFrame(rows_o, columns=["site_id", "participant_id", "outcome", "measured_on", "value"]).to_csv(o, index=False)
    return [a, u, o]


@pytest.fixture
def small_warehouse(tmp_path, monkeypatch):
    from takeup.pipeline.ingest.many_files import ingest_paths
    from takeup.pipeline.warehouse import init_warehouse
    from takeup.schemas.config import parse_config
    monkeypatch.setenv("TAKEUP_ID_KEY", TEST_KEY)
    cfg = parse_config({
        "study_id": "flowtest", "covariates": ["age"], "outcomes": [{"name": "score", "primary": True}],
        "follow_up": {"min_days": 0, "max_days": 200},
        "estimation": {"adjust_covariates": True},
        "sites": [{"site_id": f"S{i}", "group": "A" if i <= 3 else "B"} for i in range(1, 7)],
    })
    path = tmp_path / "w.duckdb"
    init_warehouse(path, cfg)
    files = _site_files(tmp_path)
    reports = ingest_paths(path, files)
    assert all(r.status == "loaded" and r.rows_quarantined == 0 for r in reports)
    return path


def _tables(path, run_id):
    con = duckdb.connect(str(path), read_only=True)
    try:
        out = {}
        for t in RESULT_TABLES:
            df = con.execute(f"SELECT * EXCLUDE (run_id) FROM {t} WHERE run_id = $r", {"r": run_id}).df()
            drop = [c for c in ("first_seen_run_id", "last_seen_run_id") if c in df.columns]
            df = df.drop(columns=drop)
            out[t] = df.sort_values(list(df.columns[:4])).reset_index(drop=True) if len(df) else df
        return out
    finally:
        con.close()


def _assert_same(a, b):
    # two consecutive runs on the same data differ only in the look number of their anytime-valid
    # sequences (the running intersection of two equal sets is the same set)
    for t in RESULT_TABLES:
        x, y = a[t].drop(columns=["look"], errors="ignore"), b[t].drop(columns=["look"], errors="ignore")
        pd.testing.assert_frame_equal(x, y, check_exact=False, rtol=1e-12, atol=1e-12, obj=t)


def test_orchestrated_run_equals_in_process(prefect_api, small_warehouse):
    from takeup.flows.monitor import run_orchestrated
    from takeup.pipeline.run.stages import run_monitoring
    plain = run_monitoring(small_warehouse, as_of=AS_OF)
    orch = run_orchestrated(small_warehouse, as_of=AS_OF)
    assert plain.mode == "in_process" and orch.mode == "orchestrated"
    assert orch.flow_run_id and plain.flow_run_id is None
    assert orch.rows["site_estimates"] == 12          # 6 sites x (unadjusted + covariate_adjusted)
    _assert_same(_tables(small_warehouse, plain.run_id), _tables(small_warehouse, orch.run_id))
    con = duckdb.connect(str(small_warehouse), read_only=True)
    row = con.execute("SELECT status, flow_run_id, timings_json FROM runs WHERE run_id = $r",
                      {"r": orch.run_id}).fetchone()
    con.close()
    assert row[0] == "ok" and row[1] == orch.flow_run_id and "site_estimates" in row[2]


def test_failing_stage_fails_the_run_and_writes_nothing(prefect_api, small_warehouse, monkeypatch):
    from dataclasses import replace
    from takeup.flows.monitor import run_orchestrated
    from takeup.pipeline.run import stages as core

    def broken(inputs, ctx, site_rows):
        raise RuntimeError("injected stage failure")

    monkeypatch.setattr(core, "STAGES", tuple(replace(s, function=broken) if s.name == "adjusted" else s
                                              for s in core.STAGES))
    con = duckdb.connect(str(small_warehouse), read_only=True)
    before = con.execute("SELECT count(*) FROM site_estimates").fetchone()[0]
    con.close()
    with pytest.raises(Exception, match="injected stage failure"):
        run_orchestrated(small_warehouse, as_of=AS_OF)
    con = duckdb.connect(str(small_warehouse), read_only=True)
    status, message = con.execute("SELECT status, message FROM runs ORDER BY started_at DESC LIMIT 1").fetchone()
    after = con.execute("SELECT count(*) FROM site_estimates").fetchone()[0]
    con.close()
    assert status == "failed" and "injected stage failure" in message
    assert after == before


def test_dask_local_cluster_equals_local_runner(prefect_api, small_warehouse):
    distributed = pytest.importorskip("distributed")
    from takeup.flows.monitor import run_orchestrated
    local = run_orchestrated(small_warehouse, as_of=AS_OF, runner="local")
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                  dashboard_address=None) as cluster:
        on_dask = run_orchestrated(small_warehouse, as_of=AS_OF, runner="dask", dask_address=cluster.scheduler_address)
    assert on_dask.status == "ok"
    _assert_same(_tables(small_warehouse, local.run_id), _tables(small_warehouse, on_dask.run_id))


def test_ingest_flow_validates_in_parallel_and_loads(prefect_api, tmp_path, monkeypatch):
    from takeup.flows.ingest import ingest_flow
    from takeup.pipeline.warehouse import init_warehouse
    from takeup.schemas.config import parse_config
    monkeypatch.setenv("TAKEUP_ID_KEY", TEST_KEY)
    path = tmp_path / "w.duckdb"
    init_warehouse(path, parse_config({"covariates": ["age"]}))
    files = _site_files(tmp_path, n_sites=2, n=20)
    bad = tmp_path / "bad.csv"
    bad.write_text("site_id,participant_id,arm,assigned_on\nS1,x1,oops,2026-03-02\n")
    out = ingest_flow([str(f) for f in files + [bad]], str(path))
    assert [v["status"] for v in out["validation"]] == ["would_load"] * 4
    assert out["validation"][-1]["reasons"] == {"unknown_arm": 1}
    assert [b["rows_loaded"] for b in out["batches"]] == [40, 40, 40, 0]
    again = ingest_flow([str(f) for f in files], str(path))
    assert all(b["status"] == "duplicate_batch" for b in again["batches"])


def test_serve_once_registers_scheduled_deployment(prefect_api, small_warehouse, tmp_path):
    from prefect.client.orchestration import get_client
    from takeup.flows.serve import serve_deployments
    from takeup.schemas.config import parse_config
    cfg = parse_config({"study_id": "flowtest", "schedule": {"cron": "15 7 * * 2", "timezone": "UTC"}})
    ids = serve_deployments(small_warehouse, cfg, tmp_path / "study.toml", incoming=tmp_path, once=True)
    assert len(ids) == 2

    import asyncio

    async def read():
        async with get_client() as client:
            return [await client.read_deployment(i) for i in ids]

    deps = asyncio.run(read())
    assert {d.name for d in deps} == {"flowtest-monitor", "flowtest-ingest"}
    for d in deps:
        assert d.schedules and d.schedules[0].schedule.cron == "15 7 * * 2"


def test_shards_on_dask_workers_equal_one_warehouse(prefect_api, small_warehouse, tmp_path, monkeypatch):
    """A study in two shard warehouses, each collected on a Dask worker and pooled: the same tables as one."""
    import json
    from concurrent.futures import ThreadPoolExecutor
    distributed = pytest.importorskip("distributed")
    from takeup.flows.monitor import run_orchestrated
    from takeup.pipeline.ingest.many_files import ingest_paths
    from takeup.pipeline.run.reproduce import reproduce_run
    from takeup.pipeline.run.stages import run_monitoring
    from takeup.pipeline.warehouse import connect, init_warehouse, stored_config
    from takeup.schemas.config import parse_config
    monkeypatch.setenv("TAKEUP_ID_KEY", TEST_KEY)
    con = connect(small_warehouse, read_only=True)
    cfg = stored_config(con)
    con.close()
    src = tmp_path / "src"
    src.mkdir()
    files = _site_files(src)                      # the small study's files (same seed)
    shard_sites = {"a": {"S1", "S2", "S3"}, "b": {"S4", "S5", "S6"}}
    shard_files = {}
    for name, sites in shard_sites.items():
        d = tmp_path / f"shard_{name}"
        d.mkdir()
        shard_files[name] = []
        for f in files:
            frame = pd.read_csv(f, dtype=str)
            out = d / f.name
            frame[frame.site_id.isin(sites)].to_csv(out, index=False)
            shard_files[name].append(out)
        init_warehouse(tmp_path / f"{name}.duckdb", cfg)

    def ingest(name):                             # one writer per shard, the shards in parallel
        return ingest_paths(tmp_path / f"{name}.duckdb", shard_files[name])

    with ThreadPoolExecutor(2) as pool:
        reports = list(pool.map(ingest, sorted(shard_sites)))
    assert all(r.status == "loaded" for rs in reports for r in rs)
    sharded = parse_config({**json.loads(cfg.canonical_json()),
                            "shards": [{"path": "a.duckdb", "name": "a"}, {"path": "b.duckdb", "name": "b"}]})
    central = tmp_path / "central.duckdb"
    init_warehouse(central, sharded)
    one = run_monitoring(small_warehouse, as_of=AS_OF)
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                  dashboard_address=None) as cluster:
        on_dask = run_orchestrated(central, as_of=AS_OF, runner="dask", dask_address=cluster.scheduler_address)
    assert on_dask.status == "ok" and on_dask.n_sites == 6
    _assert_same(_tables(small_warehouse, one.run_id), _tables(central, on_dask.run_id))
    con = duckdb.connect(str(central), read_only=True)
    sources = json.loads(con.execute("SELECT moments_sources FROM runs WHERE run_id = $r",
                                     {"r": on_dask.run_id}).fetchone()[0])
    con.close()
    assert [s["shard"] for s in sources] == ["a", "b"] and [len(s["sites"]) for s in sources] == [3, 3]
    assert reproduce_run(central, on_dask.run_id).identical

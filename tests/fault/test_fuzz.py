"""Generated malformed files (hypothesis) through ``takeup ingest``: no internal error, every file accounted
for, exit codes per the README's contract.  A modest number of examples here; the script
``benchmarks/fault_suite.py`` runs 1,000 or more."""

from __future__ import annotations

import itertools

from hypothesis import HealthCheck, given, settings

from takeup.pipeline.warehouse import init_warehouse
from takeup.schemas.config import parse_config
from tests.fault.fuzz import check_one, malformed_files
from tests.fault.scenarios import broken, consistency


def test_malformed_files_never_crash_and_always_add_up(tmp_path_factory, key_env):
    root = tmp_path_factory.mktemp("fuzz")
    warehouse = root / "w.duckdb"
    init_warehouse(warehouse, parse_config({"outcomes": [{"name": "score"}]}))
    counter = itertools.count()

    @settings(max_examples=25, deadline=None, database=None, derandomize=True,
              suppress_health_check=list(HealthCheck))
    @given(malformed_files())
    def one(f):
        r = check_one(warehouse, root, next(counter), *f)
        assert not r["traceback"], r
        assert r["contract_ok"], r

    one()
    assert broken(consistency(warehouse)) == 0

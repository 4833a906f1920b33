"""Command line: ``takeup <command> ...`` (argument parsing and printing only).

Exit codes: 0 success; 1 data problems reported (rejected files, quarantined
rows, a run that finished with errors); 2 usage or configuration error.
"""

from __future__ import annotations

import argparse
import difflib
import json
import logging
import os
import re
import sys
from datetime import date
from pathlib import Path

__all__ = ["main"]

EXIT_OK, EXIT_DATA, EXIT_USAGE = 0, 1, 2

log = logging.getLogger("takeup")


class UsageError(Exception):
    """Bad arguments or configuration (exit code 2)."""


class _Parser(argparse.ArgumentParser):
    """argparse with 'did you mean' for mistyped commands and choices."""

    def error(self, message: str):  # noqa: D401 - argparse API
        m = re.search(r"invalid choice: '([^']*)' \(choose from (.*)\)", message)
        if m:
            choices = re.findall(r"'([^']*)'", m.group(2)) or [c.strip() for c in m.group(2).split(",")]
            hint = difflib.get_close_matches(m.group(1), choices, n=1, cutoff=0.5)
            if hint:
                message += f"; did you mean '{hint[0]}'?"
        self.print_usage(sys.stderr)
        self.exit(EXIT_USAGE, f"{self.prog}: error: {message}\n")


def _date(text: str) -> date:
    try:
        return date.fromisoformat(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"not an ISO date (YYYY-MM-DD): {text!r}") from None


def _warehouse_arg(p: argparse.ArgumentParser) -> None:
    p.add_argument("--warehouse", type=Path, default=None, metavar="PATH",
                   help="DuckDB warehouse file (default: $TAKEUP_WAREHOUSE, else ./takeup.duckdb)")
    p.add_argument("--log-level", default="warning", choices=["debug", "info", "warning", "error"],
                   help="logging verbosity (default: warning)")
    p.add_argument("--quiet", action="store_true", help="print only errors and the final summary")


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(prog="takeup", description=(
        "Monitor randomised rollouts with imperfect compliance across many sites: validate and store "
        "site records, estimate ITT, complier share and CACE per site and pooled, and raise alerts."))
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    sub.required = True

    p = sub.add_parser("init", help="create a warehouse and its tables",
                       description="Create the warehouse file (mode 0600), its tables and the pseudonymisation key file.")
    _warehouse_arg(p)
    p.add_argument("--config", type=Path, help="study configuration (TOML); default: the default study")

    p = sub.add_parser("ingest", help="validate and load site files",
                       description="Load CSV or Parquet files; each file is one atomic batch.")
    _warehouse_arg(p)
    p.add_argument("--kind", choices=["assignment", "uptake", "outcome"],
                   help="record kind of all FILES (default: detected from each file's columns)")
    p.add_argument("files", nargs="+", type=Path, metavar="FILE")

    p = sub.add_parser("demo", help="generate the demo scenario, ingest it and run the monitoring",
                       description="Generate the invented demo (30 learning centres, 24 upload weeks), load it into "
                                   "a fresh warehouse and run the monitoring on it.")
    _warehouse_arg(p)
    p.add_argument("--out", type=Path, default=Path("sample_warehouse"),
                   help="directory for the generated files (default: sample_warehouse)")
    p.add_argument("--seed", type=int, default=None, help="random seed (default: the documented demo seed)")
    p.add_argument("--no-run", action="store_true", help="only generate and ingest")
    p.add_argument("--orchestrated", action="store_true", help="run the monitoring as a Prefect flow")
    return parser


def _setup_logging(level: str) -> None:
    logging.basicConfig(level=getattr(logging, level.upper()), format="%(levelname)s %(name)s: %(message)s")


def _warehouse(args) -> Path:
    from pipeline.warehouse import default_warehouse_path
    return args.warehouse if args.warehouse is not None else default_warehouse_path()


# ----------------------------------------------------------------------------- commands
def cmd_init(args) -> int:
    from pipeline.warehouse import init_warehouse
    from schemas.config import load_config
    config = load_config(args.config) if args.config else None
    path, key_path = init_warehouse(_warehouse(args), config)
    print(f"warehouse ready: {path}")
    if key_path is not None:
        print(f"pseudonymisation key: {key_path} (mode 0600; keep it safe, it links pseudonyms to identifiers)")
    else:
        print("pseudonymisation key: from TAKEUP_ID_KEY")
    return EXIT_OK


def _print_reports(reports, quiet: bool) -> int:
    problems = 0
    tot = {"read": 0, "loaded": 0, "quarantined": 0, "duplicate": 0, "pending": 0}
    for r in reports:
        name = Path(r.file).name
        if r.status == "duplicate_batch":
            if not quiet:
                print(f"skipped   {name}: {r.message}")
            continue
        if r.status == "rejected":
            problems += 1
            print(f"REJECTED  {name}: {r.message}", file=sys.stderr)
            continue
        tot["read"] += r.rows_read
        tot["loaded"] += r.rows_loaded
        tot["quarantined"] += r.rows_quarantined
        tot["duplicate"] += r.rows_duplicate
        tot["pending"] += r.rows_pending
        if r.rows_quarantined:
            problems += 1
        if not quiet or r.rows_quarantined:
            why = ""
            if r.reasons:
                why = "  (" + ", ".join(f"{k} {v}" for k, v in r.reasons.items()) + ")"
            print(f"loaded    {name} [{r.kind}]: read {r.rows_read}, loaded {r.rows_loaded}, "
                  f"quarantined {r.rows_quarantined}, duplicate {r.rows_duplicate}{why}")
    n_files = len(reports)
    n_skip = sum(r.status == "duplicate_batch" for r in reports)
    n_rej = sum(r.status == "rejected" for r in reports)
    print(f"{n_files} file(s): {n_files - n_skip - n_rej} loaded, {n_skip} already loaded, {n_rej} rejected; "
          f"rows read {tot['read']} = loaded {tot['loaded']} + quarantined {tot['quarantined']} "
          f"+ duplicate {tot['duplicate']}" + (f"; {tot['pending']} loaded rows await their assignment"
                                               if tot["pending"] else ""))
    return EXIT_DATA if problems else EXIT_OK


def _ingest_paths(warehouse: Path, files, kind, quiet: bool):
    from pipeline.ingest_many import ingest_paths
    return ingest_paths(warehouse, files, kind=kind, progress=not quiet and sys.stdout.isatty())


def cmd_ingest(args) -> int:
    reports = _ingest_paths(_warehouse(args), args.files, args.kind, args.quiet)
    return _print_reports(reports, args.quiet)


def cmd_demo(args) -> int:
    from pipeline.demo import DEMO_SEED, generate_demo
    from pipeline.warehouse import init_warehouse
    from schemas.config import load_config
    out: Path = args.out
    warehouse = args.warehouse if args.warehouse is not None else out / "demo.duckdb"
    print(f"generating the demo scenario under {out} ...")
    manifest = generate_demo(out, seed=args.seed if args.seed is not None else DEMO_SEED)
    for suffix in ("", ".wal"):
        p = Path(str(warehouse) + suffix)
        if p.exists():
            p.unlink()
    init_warehouse(warehouse, load_config(manifest.config_path))
    print(f"{len(manifest.files)} upload files for {manifest.n_participants} participants; ingesting into {warehouse} ...")
    reports = _ingest_paths(warehouse, list(manifest.files), None, True)
    _print_reports(reports, True)
    print(f"warehouse: {warehouse}")
    print(f"scenario and planted problems: {out / 'README.md'}")
    return EXIT_OK


COMMANDS = {"init": cmd_init, "ingest": cmd_ingest, "demo": cmd_demo}


def main(argv: list[str] | None = None) -> int:
    from pipeline.ingest import IngestError
    from pipeline.warehouse import WarehouseError
    from schemas.config import ConfigError
    parser = build_parser()
    args = parser.parse_args(argv)
    _setup_logging(args.log_level)
    try:
        return COMMANDS[args.command](args)
    except (ConfigError, UsageError) as exc:
        print(f"takeup {args.command}: {exc}", file=sys.stderr)
        return EXIT_USAGE
    except (WarehouseError, FileNotFoundError) as exc:
        print(f"takeup {args.command}: {exc}", file=sys.stderr)
        return EXIT_USAGE
    except IngestError as exc:
        print(f"takeup {args.command}: {exc}", file=sys.stderr)
        return EXIT_DATA
    except KeyboardInterrupt:
        print("interrupted; every batch and run is atomic, nothing half-written was kept", file=sys.stderr)
        return 130


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())

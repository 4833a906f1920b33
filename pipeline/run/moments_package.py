"""Moments packages: a warehouse's aggregates in one file, and pooling several into one run's inputs.

A run reads only sums from the participant records (:func:`~takeup.pipeline.run.inputs.collect_aggregates`):
counts and sums of D, Y, D², Y², DY per site x outcome x arm (x cluster), covariate cells, cohort and
calendar counts, site activity and the covariate-adjusted rows' two passes of sums.  Sums over disjoint
sets of sites concatenate, so a study whose sites live in several warehouses (regions that may not share
participant records, or shards of a very large rollout) can be analysed centrally from these aggregates
alone, with the same results as one warehouse holding every site.

A package is a ZIP file (stored, not compressed: the parts are Parquet) holding

* ``manifest.json`` — format and schema version, study id, configuration hash and the configuration
  itself, as-of date, data cutoff, code version, the cohort origin, the sites, the SHA-256 of every
  part and a confidentiality statement;
* ``parts/<field>.parquet`` — one part per aggregate field of :class:`RunInputs` (written generically
  over the dataclass's fields, so a frame added to ``RunInputs`` is carried without change here), the
  covariate-adjusted sums (``parts/adjusted.parquet``) and the loaded batches' content hashes
  (``parts/batches.parquet``, for the combined input fingerprint).

The package's identity is the SHA-256 of its manifest bytes (which hold every part's hash).

Not simply additive, and handled explicitly by :func:`merge_packages`: the sites (a union; a site in
two packages is refused), the outcomes (identical, or declared in the configuration), the cohort origin
(the earliest; every package's periods must lie on the same grid), the number of batches (a sum), the
input fingerprint (recomputed over the union of the batches' hashes: the same formula as one
warehouse's), and the as-of date, study and configuration (identical).

The covariate-adjusted rows need two passes over the records: the second pass joins each site's
coefficients, which come from that site's own first-pass sums.  Both passes therefore run where the
site's records are, and the package carries the second pass's sums (the robust "meat") as well as the
first pass's cross-products; nothing travels back from the centre.
"""

from __future__ import annotations

import hashlib
import io
import json
import os
import zipfile
from dataclasses import dataclass, fields, replace
from datetime import date, datetime, timezone
from pathlib import Path
from typing import Iterable, Sequence

import duckdb
import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from takeup.pipeline.errors import PackageError
from takeup.pipeline.run.adjusted_sql import AdjustedMoments
from takeup.pipeline.run.inputs import CENTRAL_STATE_FIELDS, RunContext, RunInputs, collect_aggregates
from takeup.pipeline.stats.estimators.adjusted import CrossMoments, ScoreMoments
from takeup.schemas.config import StudyConfig

__all__ = ["PackageError", "MomentsPackage", "PACKAGE_FORMAT", "PACKAGE_SCHEMA_VERSION", "CONFIDENTIALITY",
           "package_from_warehouse", "write_package", "read_package", "package_paths", "merge_packages",
           "batch_hashes", "combined_fingerprint", "aggregate_fields"]

PACKAGE_FORMAT = "takeup-moments"
#: 1: first version (ZIP of Parquet parts + manifest.json)
PACKAGE_SCHEMA_VERSION = 1

CONFIDENTIAL_TEXT = (
    "CONFIDENTIAL. This package holds aggregates only (no participant identifier, raw or pseudonymised, and "
    "no participant-level value), but its cells are not suppressed: a cell may describe one or a few "
    "participants. Hold, send and store it only as the study's data-sharing agreement allows, under the "
    "same protection as the study's analysis results before publication; publish nothing from it directly.")
CONFIDENTIALITY = CONFIDENTIAL_TEXT


@dataclass(frozen=True)
class MomentsPackage:
    """One warehouse's aggregates: a package read from a file, or a shard collected in this run."""

    label: str                       # file name, or shard path
    sha256: str | None               # SHA-256 of the manifest bytes (None for a shard collected in this run)
    manifest: dict                   # header (study, config, as_of, ...) and, for files, the parts' hashes
    aggregates: RunInputs            # CENTRAL_STATE_FIELDS empty
    batch_hashes: tuple[str, ...]    # content hashes of the loaded batches read


def aggregate_fields() -> tuple[str, ...]:
    """The fields of :class:`RunInputs` a package carries (all but :data:`CENTRAL_STATE_FIELDS`)."""
    return tuple(f.name for f in fields(RunInputs) if f.name not in CENTRAL_STATE_FIELDS)


def batch_hashes(con: duckdb.DuckDBPyConnection, data_cutoff: datetime) -> tuple[str, ...]:
    """Content hashes of the batches loaded by ``data_cutoff`` (sorted; the basis of ``input_fingerprint``)."""
    rows = con.execute("SELECT sha256 FROM batches WHERE status = 'loaded' AND received_at <= $c ORDER BY sha256",
                       {"c": data_cutoff}).fetchall()
    return tuple(r[0] for r in rows)


def combined_fingerprint(hashes: Iterable[str]) -> str:
    """``input_fingerprint`` over batches from several warehouses (same formula as one warehouse's)."""
    h = hashlib.sha256()
    for s in sorted(hashes):
        h.update(s.encode())
    return h.hexdigest()


def _header(ctx: RunContext, aggregates: RunInputs) -> dict:
    from takeup.pipeline.run.writer import code_version
    from takeup.pipeline.warehouse import SCHEMA_VERSION
    return {
        "format": PACKAGE_FORMAT, "package_schema_version": PACKAGE_SCHEMA_VERSION,
        "warehouse_schema_version": SCHEMA_VERSION, "code_version": code_version(),
        "study_id": ctx.config.study_id, "config_hash": ctx.config_hash,
        "config": json.loads(ctx.config.canonical_json()),
        "as_of": ctx.as_of.isoformat(), "data_cutoff": ctx.data_cutoff.isoformat(),
        "created_at": datetime.now(timezone.utc).replace(tzinfo=None).isoformat(),
        "sites": list(aggregates.sites), "confidentiality": CONFIDENTIAL_TEXT,
    }


def package_from_warehouse(con: duckdb.DuckDBPyConnection, ctx: RunContext, label: str) -> MomentsPackage:
    """Collect the aggregates of the warehouse behind ``con`` (read only) as an in-memory package."""
    aggregates = collect_aggregates(con, ctx)
    return MomentsPackage(label=label, sha256=None, manifest=_header(ctx, aggregates), aggregates=aggregates,
                          batch_hashes=batch_hashes(con, ctx.data_cutoff))


# ----------------------------------------------------------------------------- encoding
def _frame_bytes(frame: pd.DataFrame) -> bytes:
    sink = io.BytesIO()
    pq.write_table(pa.Table.from_pandas(frame, preserve_index=False), sink)
    return sink.getvalue()


def _frame_from(data: bytes) -> pd.DataFrame:
    return pq.read_table(io.BytesIO(data)).to_pandas()


def _adjusted_frame(adjusted: dict[str, AdjustedMoments]) -> pd.DataFrame:
    """The two passes' sums as one row per outcome x site (arrays flattened into numbered columns)."""
    rows = []
    for outcome, am in adjusted.items():
        s = len(am.sites)
        cols: dict = {"outcome": [outcome] * s, "site_id": list(am.sites),
                      "n_covariates": [am.cross.n_covariates] * s, "n": am.cross.n.astype(float)}
        for name, arr in (("cross", am.cross.cross), ("meat_iv", am.scores.meat_iv), ("meat_fs", am.scores.meat_fs)):
            m = arr.shape[1]
            for i in range(m):
                for j in range(m):
                    cols[f"{name}_{i}_{j}"] = arr[:, i, j].astype(float)
        cols["n_clusters"] = (am.scores.n_clusters.astype(float) if am.scores.n_clusters is not None
                              else np.full(s, np.nan))
        cols["n_strata"] = (am.cross.n_strata.astype(float) if am.cross.n_strata is not None
                            else np.full(s, np.nan))
        rows.append(pd.DataFrame(cols))
    return pd.concat(rows, ignore_index=True) if rows else pd.DataFrame(columns=["outcome", "site_id"])


def _adjusted_from(frame: pd.DataFrame, clustered: bool) -> dict[str, AdjustedMoments]:
    out: dict[str, AdjustedMoments] = {}
    for outcome, f in frame.groupby("outcome", sort=False):
        p = int(f["n_covariates"].iloc[0])

        def arr(name: str, m: int) -> np.ndarray:
            a = np.zeros((len(f), m, m))
            for i in range(m):
                for j in range(m):
                    a[:, i, j] = f[f"{name}_{i}_{j}"].to_numpy(dtype=float)
            return a

        strata = f["n_strata"].to_numpy(dtype=float) if "n_strata" in f.columns else np.full(len(f), np.nan)
        cross = CrossMoments(n=f["n"].to_numpy(dtype=float), cross=arr("cross", p + 4), n_covariates=p,
                             n_strata=None if np.isnan(strata).all() else np.where(np.isnan(strata), 1.0, strata))
        scores = ScoreMoments(meat_iv=arr("meat_iv", p + 2), meat_fs=arr("meat_fs", p + 2),
                              n_clusters=f["n_clusters"].to_numpy(dtype=float) if clustered else None)
        out[str(outcome)] = AdjustedMoments(outcome=str(outcome), sites=tuple(f["site_id"]), cross=cross,
                                            scores=scores)
    return out


def _encode_fields(agg: RunInputs) -> tuple[dict, dict[str, bytes]]:
    """Manifest entries and parts for every field of :func:`aggregate_fields`."""
    entries, parts = {}, {}
    for name in aggregate_fields():
        value = getattr(agg, name)
        if value is None:
            entries[name] = {"kind": "none"}
        elif isinstance(value, pd.DataFrame):
            part = f"parts/{name}.parquet"
            parts[part] = _frame_bytes(value)
            entries[name] = {"kind": "frame", "part": part}
        elif name == "adjusted":
            part = "parts/adjusted.parquet"
            parts[part] = _frame_bytes(_adjusted_frame(value))
            entries[name] = {"kind": "adjusted", "part": part}
        elif isinstance(value, tuple) and all(isinstance(v, str) for v in value):
            entries[name] = {"kind": "strings", "value": list(value)}
        elif isinstance(value, date):
            entries[name] = {"kind": "date", "value": value.isoformat()}
        elif isinstance(value, (bool, int, str)):
            entries[name] = {"kind": type(value).__name__, "value": value}
        else:
            raise PackageError(f"a moments package cannot carry the run input {name!r} ({type(value).__name__}); "
                               "teach pipeline/run/moments_package.py its encoding")
    return entries, parts


def _decode_fields(entries: dict, parts: dict[str, bytes], clustered: bool, label: str) -> dict:
    expected = set(aggregate_fields())
    missing = sorted(expected - set(entries))
    unknown = sorted(set(entries) - expected)
    if missing or unknown:
        what = "; ".join(x for x in (f"lacks {', '.join(missing)}" if missing else "",
                                     f"has unknown {', '.join(unknown)}" if unknown else "") if x)
        raise PackageError(f"{label}: the package {what} (written by another takeup version); "
                           "rebuild it with 'takeup moments' of this version")
    out = {}
    for name, e in entries.items():
        kind = e.get("kind")
        if kind == "none":
            out[name] = None
        elif kind == "frame":
            out[name] = _frame_from(parts[e["part"]])
        elif kind == "adjusted":
            out[name] = _adjusted_from(_frame_from(parts[e["part"]]), clustered)
        elif kind == "strings":
            out[name] = tuple(e["value"])
        elif kind == "date":
            out[name] = date.fromisoformat(e["value"])
        elif kind in ("bool", "int", "str"):
            out[name] = e["value"]
        else:
            raise PackageError(f"{label}: manifest.json field {name!r} has unknown kind {kind!r}")
    return out


def _sha256(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def write_package(package: MomentsPackage, out: Path, mode: int = 0o600, force: bool = False) -> str:
    """Write ``package`` to the ZIP file ``out`` (mode ``mode``); returns the package's SHA-256.

    An existing ``out`` is replaced only with ``force``.
    """
    out = Path(out)
    if out.exists() and not force:
        raise PackageError(f"{out} exists; pass --force to replace it")
    entries, parts = _encode_fields(package.aggregates)
    parts["parts/batches.parquet"] = _frame_bytes(pd.DataFrame({"sha256": list(package.batch_hashes)},
                                                               dtype=object))
    manifest = {**package.manifest, "fields": entries,
                "parts": {name: _sha256(data) for name, data in sorted(parts.items())}}
    manifest_bytes = json.dumps(manifest, sort_keys=True, indent=1).encode()
    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = out.with_name(out.name + ".partial")
    fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, mode)
    try:
        with os.fdopen(fd, "wb") as fh, zipfile.ZipFile(fh, "w", compression=zipfile.ZIP_STORED) as z:
            z.writestr("manifest.json", manifest_bytes)
            for name, data in sorted(parts.items()):
                z.writestr(name, data)
        os.chmod(tmp, mode)
        os.replace(tmp, out)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    return _sha256(manifest_bytes)


def read_package(source: Path | bytes, label: str | None = None) -> MomentsPackage:
    """Read and verify a package (a path, or the bytes of one); every part must match its manifest hash."""
    label = label or (Path(source).name if not isinstance(source, bytes) else "package")
    try:
        z = zipfile.ZipFile(io.BytesIO(source) if isinstance(source, bytes) else Path(source))
    except FileNotFoundError:
        raise PackageError(f"{label}: no such file") from None
    except (zipfile.BadZipFile, OSError) as exc:
        raise PackageError(f"{label}: not a moments package (not a readable ZIP file: {exc})") from None
    with z:
        names = set(z.namelist())
        if "manifest.json" not in names:
            raise PackageError(f"{label}: not a moments package (no manifest.json)")
        manifest_bytes = z.read("manifest.json")
        try:
            manifest = json.loads(manifest_bytes)
        except ValueError as exc:
            raise PackageError(f"{label}: manifest.json is not valid JSON ({exc})") from None
        if manifest.get("format") != PACKAGE_FORMAT:
            raise PackageError(f"{label}: manifest.json format is {manifest.get('format')!r}, not {PACKAGE_FORMAT!r}")
        if manifest.get("package_schema_version") != PACKAGE_SCHEMA_VERSION:
            raise PackageError(f"{label}: package schema version {manifest.get('package_schema_version')!r}; "
                               f"this takeup reads version {PACKAGE_SCHEMA_VERSION}")
        listed = manifest.get("parts") or {}
        extra = sorted(names - set(listed) - {"manifest.json"})
        if extra:
            raise PackageError(f"{label}: file(s) {', '.join(extra)} are not listed in manifest.json")
        parts = {}
        for name, digest in listed.items():
            if name not in names:
                raise PackageError(f"{label}: part {name} listed in manifest.json is missing")
            data = z.read(name)
            if _sha256(data) != digest:
                raise PackageError(f"{label}: part {name} does not match its SHA-256 in manifest.json "
                                   "(altered or damaged); refused")
            parts[name] = data
    clustered = manifest.get("config", {}).get("randomisation_unit") == "cluster"
    values = _decode_fields(manifest.get("fields") or {}, parts, clustered, label)
    aggregates = RunInputs(**values, previous_alerts=pd.DataFrame(), previous_run_id=None)
    hashes = tuple(_frame_from(parts["parts/batches.parquet"])["sha256"]) if "parts/batches.parquet" in parts else ()
    header = {k: v for k, v in manifest.items() if k not in ("fields", "parts")}
    return MomentsPackage(label=label, sha256=_sha256(manifest_bytes), manifest=header, aggregates=aggregates,
                          batch_hashes=hashes)


def package_paths(paths: Sequence[Path]) -> list[Path]:
    """Expand ``--from-moments`` arguments: a file is a package; a directory gives its ``*.zip`` files."""
    out: list[Path] = []
    for p in paths:
        p = Path(p)
        if p.is_dir():
            found = sorted(q for q in p.iterdir() if q.is_file() and q.suffix == ".zip")
            if not found:
                raise PackageError(f"{p}: directory holds no package (*.zip)")
            out.extend(found)
        elif p.exists():
            out.append(p)
        else:
            raise PackageError(f"{p}: no such file or directory")
    return out


# ----------------------------------------------------------------------------- pooling
def _flatten(obj, prefix: str = "") -> dict:
    if isinstance(obj, dict):
        out = {}
        for k, v in obj.items():
            out.update(_flatten(v, f"{prefix}.{k}" if prefix else str(k)))
        return out
    return {prefix: obj}


def _config_difference(theirs: dict, ours: dict, limit: int = 4) -> str:
    a, b = _flatten(theirs), _flatten(ours)
    keys = sorted(k for k in set(a) | set(b) if a.get(k) != b.get(k))
    shown = [f"{k} is {json.dumps(a.get(k))} there and {json.dumps(b.get(k))} here" for k in keys[:limit]]
    more = f" and {len(keys) - limit} more" if len(keys) > limit else ""
    return "; ".join(shown) + more


def _check_package(pkg: MomentsPackage, config: StudyConfig, as_of: date | None) -> None:
    m = pkg.manifest
    if m.get("study_id") != config.study_id:
        raise PackageError(f"{pkg.label}: the package is from study {m.get('study_id')!r}, this warehouse's study "
                           f"is {config.study_id!r}; refused")
    if m.get("config_hash") != config.config_hash():
        diff = _config_difference(m.get("config") or {}, json.loads(config.canonical_json()))
        raise PackageError(f"{pkg.label}: the package was built with another configuration of study "
                           f"{config.study_id!r} (hash {str(m.get('config_hash'))[:12]} vs {config.config_hash()[:12]}): "
                           f"{diff}; refused")
    if as_of is not None and m.get("as_of") != as_of.isoformat():
        raise PackageError(f"{pkg.label}: the package is as of {m.get('as_of')}, the run as of {as_of}; refused")


def _merge_frames(frames: list[pd.DataFrame | None]) -> pd.DataFrame | None:
    present = [f for f in frames if f is not None]
    if not present:
        return None
    nonempty = [f for f in present if len(f)]
    if not nonempty:
        return present[0]
    if len(nonempty) == 1:
        out = nonempty[0].reset_index(drop=True)
    else:
        out = pd.concat(nonempty, ignore_index=True)
    if "site_id" in out.columns:
        # each part is ordered with site_id as its leading key; a stable sort on it gives one warehouse's order
        out = out.sort_values("site_id", kind="stable").reset_index(drop=True)
    return out


def _merge_adjusted(parts: list[dict[str, AdjustedMoments]], sites: tuple[str, ...]) -> dict[str, AdjustedMoments]:
    outcomes: list[str] = []
    for p in parts:
        outcomes += [o for o in p if o not in outcomes]
    pos = {s: i for i, s in enumerate(sites)}
    out = {}
    for outcome in outcomes:
        pieces = [p[outcome] for p in parts if outcome in p]
        p_cov = pieces[0].cross.n_covariates
        m, k, s = p_cov + 4, p_cov + 2, len(sites)
        n, cross = np.zeros(s), np.zeros((s, m, m))
        mi, mf = np.zeros((s, k, k)), np.zeros((s, k, k))
        clustered = pieces[0].scores.n_clusters is not None
        g = np.zeros(s) if clustered else None
        # strata absorbed per site: one where a package centred within sites only
        strata = np.ones(s) if any(am.cross.n_strata is not None for am in pieces) else None
        for am in pieces:
            idx = np.array([pos[x] for x in am.sites], dtype=int)
            n[idx], cross[idx] = am.cross.n, am.cross.cross
            if strata is not None and am.cross.n_strata is not None:
                strata[idx] = am.cross.n_strata
            mi[idx], mf[idx] = am.scores.meat_iv, am.scores.meat_fs
            if clustered:
                g[idx] = am.scores.n_clusters
        out[outcome] = AdjustedMoments(outcome=outcome, sites=sites,
                                       cross=CrossMoments(n=n, cross=cross, n_covariates=p_cov, n_strata=strata),
                                       scores=ScoreMoments(meat_iv=mi, meat_fs=mf, n_clusters=g))
    return out


def merge_packages(packages: Sequence[MomentsPackage], config: StudyConfig, as_of: date | None = None
                   ) -> tuple[RunInputs, date]:
    """Pool packages of disjoint sites into one run's aggregates (central state left empty).

    Refuses (:class:`PackageError`, naming the packages and the difference) a package given twice, a
    package of another study or configuration, differing as-of dates, a site in two packages, differing
    outcome names (when the configuration declares none) and cohort periods on different grids.
    Returns the pooled aggregates and the as-of date.
    """
    if not packages:
        raise PackageError("no moments package given")
    seen: dict[str, str] = {}
    for pkg in packages:
        if pkg.sha256 is not None:
            if pkg.sha256 in seen:
                raise PackageError(f"{pkg.label}: the same package as {seen[pkg.sha256]} (given twice)")
            seen[pkg.sha256] = pkg.label
        _check_package(pkg, config, as_of)
    dates = {pkg.manifest.get("as_of") for pkg in packages}
    if len(dates) > 1:
        listing = ", ".join(f"{pkg.label} as of {pkg.manifest.get('as_of')}" for pkg in packages)
        raise PackageError(f"the packages have different as-of dates ({listing}); build them with one --as-of")
    run_as_of = date.fromisoformat(dates.pop())
    owner: dict[str, str] = {}
    for pkg in packages:
        agg = pkg.aggregates
        held = set(agg.sites) | set(agg.site_activity["site_id"] if len(agg.site_activity) else [])
        for site in sorted(held):
            if site in owner:
                raise PackageError(f"site {site!r} is in both {owner[site]} and {pkg.label}: each site must be in "
                                   "exactly one package")
            owner[site] = pkg.label
    outcome_sets = {pkg.aggregates.outcomes for pkg in packages}
    if len(outcome_sets) > 1:
        listing = "; ".join(f"{pkg.label}: {', '.join(pkg.aggregates.outcomes) or 'none'}" for pkg in packages)
        raise PackageError(f"the packages hold different outcomes ({listing}); declare the study's outcomes "
                           "([[outcomes]]) in the configuration and rebuild the packages")
    origins = [(pkg.label, pkg.aggregates.cohort_origin) for pkg in packages if pkg.aggregates.cohort_origin]
    origin = min((o for _, o in origins), default=None)
    period = config.trends.period_days
    off = [(label, o) for label, o in origins if (o - origin).days % period]
    if off:
        raise PackageError(
            f"the packages' {period}-day trend periods lie on different grids ({off[0][0]} starts on {off[0][1]}, "
            f"the earliest package on {origin}); use weekly periods (trends.period_days = 7, aligned to Mondays) "
            "for a study split across warehouses")
    aggs = [pkg.aggregates for pkg in packages]
    sites = tuple(sorted(set().union(*(a.sites for a in aggs))))
    merged = {}
    for name in aggregate_fields():
        values = [getattr(a, name) for a in aggs]
        if name == "sites":
            merged[name] = sites
        elif name == "outcomes":
            merged[name] = aggs[0].outcomes
        elif name == "n_batches":
            merged[name] = int(sum(values))
        elif name == "input_fingerprint":
            merged[name] = combined_fingerprint(h for pkg in packages for h in pkg.batch_hashes)
        elif name == "cohort_origin":
            merged[name] = origin
        elif name == "adjusted":
            merged[name] = _merge_adjusted(values, sites) if any(values) else {}
        elif all(v is None or isinstance(v, pd.DataFrame) for v in values):
            merged[name] = _merge_frames(values)
        else:
            raise PackageError(f"the run input {name!r} has no pooling rule; teach pipeline/run/moments_package.py")
    inputs = replace(aggs[0], **merged)
    return inputs, run_as_of

"""The whole build: discover sources, run the five stages in order, publish.

Each stage is a function from tables to tables (see the stage modules); this module only
wires them together, reads the optional project config and the steward's synonyms file, and
assembles ``sources`` and ``build_info``.
"""

from __future__ import annotations

import hashlib
import json
import logging
import os
import shutil
import sys
import time
import tomllib
from dataclasses import dataclass, field
from datetime import UTC, datetime
from importlib.metadata import PackageNotFoundError, version
from pathlib import Path
from time import perf_counter
from types import TracebackType

import duckdb
import pandas as pd
from rich.progress import (
    BarColumn,
    MofNCompleteColumn,
    Progress,
    SpinnerColumn,
    TaskID,
    TextColumn,
    TimeElapsedColumn,
)

from pipeline import (
    checks,
    consolidate,
    identity,
    lineage,
    physchem,
    provenance,
    publish,
    stage_cache,
)
from pipeline.descriptor import DescriptorError, discover_sources
from pipeline.schemas import SCHEMA_VERSION

SYNONYMS_FILE = "synonyms.csv"
DEFAULT_RAW = Path("raw")
DEFAULT_OUT = Path("build/kaledger.duckdb")
STAGES = ("ingest", "normalize", "validate", "consolidate", "publish")

log = logging.getLogger(__name__)


class StageProgress:
    """Progress over the build's stages: log records always, a rich bar when ``enabled``.

    ``begin(stage)`` ends the stage before it (logging its time) and starts the next; leaving
    the ``with`` block ends the last one. The bar is transient (it is cleared when the build
    ends) and refreshes on its own, so a long stage shows a running clock.
    """

    def __init__(self, enabled: bool = False) -> None:
        self._progress: Progress | None = None
        self._task: TaskID | None = None
        self._current: str | None = None
        self._t0 = 0.0
        if enabled:
            self._progress = Progress(
                SpinnerColumn(), TextColumn("{task.description:<12}"), BarColumn(),
                MofNCompleteColumn(), TimeElapsedColumn(), transient=True,
            )
            self._task = self._progress.add_task("build", total=len(STAGES))

    def __enter__(self) -> StageProgress:
        if self._progress is not None:
            self._progress.start()
        return self

    def __exit__(
        self, exc_type: type[BaseException] | None, exc: BaseException | None, tb: TracebackType | None
    ) -> None:
        if exc_type is None:
            self._end()
        elif self._current is not None:
            log.info("%s failed after %.2f s", self._current, perf_counter() - self._t0)
        if self._progress is not None:
            self._progress.stop()

    def _end(self) -> None:
        if self._current is None:
            return
        log.info("%s done in %.2f s", self._current, perf_counter() - self._t0)
        if self._progress is not None and self._task is not None:
            self._progress.advance(self._task)
        self._current = None

    def begin(self, stage: str) -> None:
        """End the running stage and start ``stage`` (one of :data:`STAGES`)."""
        if stage not in STAGES:
            raise ValueError(f"unknown stage {stage!r}; stages: {', '.join(STAGES)}")
        self._end()
        self._current, self._t0 = stage, perf_counter()
        log.info("%s started", stage)
        if self._progress is not None and self._task is not None:
            self._progress.update(self._task, description=stage)


@dataclass
class BuildSummary:
    out_path: Path
    rows_read: int = 0
    accepted: int = 0
    rejected_rows: int = 0
    findings: dict[str, int] = field(default_factory=dict)  # severity -> count
    per_source: pd.DataFrame = field(default_factory=pd.DataFrame)
    rejects_by_field: pd.DataFrame = field(default_factory=pd.DataFrame)
    compounds: int = 0
    recommended: int = 0
    up_to_date: bool = False  # nothing changed since the published file was built

    def lines(self) -> list[str]:
        """A short human-readable account of the build, stage by stage."""
        out = [
            f"ingest      {len(self.per_source)} sources, {self.rows_read} rows read",
            f"normalize   {self.accepted} accepted, {self.rejected_rows} rejected, "
            f"{self.compounds} compounds",
            "validate    " + ", ".join(f"{n} {s}" for s, n in self.findings.items()) + " findings",
            f"consolidate {self.recommended} recommended values",
            f"publish     {self.out_path}" + (" (up to date: inputs unchanged)" if self.up_to_date else ""),
            "",
            self.per_source.to_string(index=False),
        ]
        if not self.rejects_by_field.empty:
            out += ["", "rejected cells by source and field:", self.rejects_by_field.to_string(index=False)]
        return out


def package_version() -> str:
    try:
        return version("kaledger")
    except PackageNotFoundError:
        return "unknown"


#: Settings of the ``[consolidate]`` config section: key -> (type, what it is).
CONSOLIDATE_KEYS = {
    "reference_temperature_k": (float, "temperature [K] all members are carried to"),
    "reference_ionic_strength_molal": (float, "ionic strength [mol/kg] all members are carried to"),
    "activity_model": (str, "activity model of the ionic-strength transfer"),
}


def _check_consolidate_section(path: Path, section: object) -> None:
    """Refuse a ``[consolidate]`` section with unknown keys, wrong types or half a state."""
    if not isinstance(section, dict):
        raise DescriptorError(path, "[consolidate] must be a table of settings")
    for key, value in section.items():
        if key not in CONSOLIDATE_KEYS:
            raise DescriptorError(path, f"[consolidate] unknown key {key!r}; valid keys: {', '.join(CONSOLIDATE_KEYS)}")
        kind, meaning = CONSOLIDATE_KEYS[key]
        ok = isinstance(value, str) if kind is str else isinstance(value, int | float) and not isinstance(value, bool)
        if not ok:
            raise DescriptorError(path, f"[consolidate] {key} = {value!r} must be a {'text' if kind is str else 'number'} ({meaning})")
    t, i = section.get("reference_temperature_k"), section.get("reference_ionic_strength_molal")
    if (t is None) != (i is None):
        raise DescriptorError(
            path, "[consolidate] give both reference_temperature_k and reference_ionic_strength_molal, or neither"
        )
    if t is not None and (t <= 0 or i < 0):
        raise DescriptorError(path, f"[consolidate] reference state {t} K, {i} mol/kg is not physical (T > 0, I >= 0)")
    model = section.get("activity_model")
    if model is not None and model not in physchem.ACTIVITY_MODELS:
        raise DescriptorError(
            path, f"[consolidate] activity_model {model!r} is unknown; valid: {', '.join(physchem.ACTIVITY_MODELS)}"
        )


def load_config(path: Path | None) -> dict:
    """Read the project config (``kaledger.toml``).

    ``[rules.<name>]`` tables hold rule settings; an optional ``[consolidate]`` table sets a
    reference state (``reference_temperature_k`` and ``reference_ionic_strength_molal``,
    optionally ``activity_model``) to which every member is carried before the consensus.
    """
    if path is None or not path.is_file():
        return {}
    try:
        config = tomllib.loads(path.read_text(encoding="utf-8"))
    except tomllib.TOMLDecodeError as exc:
        raise DescriptorError(path, f"is not valid TOML: {exc}") from None
    unknown = sorted(set(config) - {"rules", "consolidate"})
    if unknown:
        raise DescriptorError(path, f"unknown section [{unknown[0]}]; valid sections: rules, consolidate")
    bad = sorted(set(config.get("rules", {})) - set(checks.RULES))
    if bad:
        raise DescriptorError(path, f"unknown rule {bad[0]!r}; rules: {', '.join(checks.RULES)}")
    if "consolidate" in config:
        _check_consolidate_section(path, config["consolidate"])
    return config


def consolidate_options(config: dict) -> dict:
    """Keyword arguments of :func:`pipeline.consolidate.consolidate` from the config."""
    section = config.get("consolidate", {})
    options: dict = {}
    if "reference_temperature_k" in section:
        options["reference_state"] = (
            float(section["reference_temperature_k"]), float(section["reference_ionic_strength_molal"])
        )
    if "activity_model" in section:
        options["activity_model"] = section["activity_model"]
    return options


def load_synonyms(raw_dir: Path) -> pd.DataFrame | None:
    """The steward's synonyms file ``raw/synonyms.csv`` (lines starting with '#' are comments)."""
    path = raw_dir / SYNONYMS_FILE
    if not path.is_file():
        return None
    frame = pd.read_csv(path, comment="#", dtype=str, keep_default_na=False)
    missing = {"synonym", "smiles"} - set(frame.columns)
    if missing:
        raise DescriptorError(path, f"missing column {sorted(missing)[0]!r}; needs synonym, smiles")
    return frame.replace("", None)


#: Environment variable for the reliability tests: the build sleeps at that stage
#: (one of :data:`STAGES`) after printing "paused at <stage>" to stderr, so a test can kill it there.
PAUSE_ENV = "KALEDGER_TEST_PAUSE_AT"


def _pause_for_test(stage: str) -> None:
    """Sleep here if ``KALEDGER_TEST_PAUSE_AT`` names ``stage`` (test hook; no effect otherwise)."""
    if os.environ.get(PAUSE_ENV) == stage:
        print(f"kaledger: paused at {stage}", file=sys.stderr, flush=True)
        time.sleep(float(os.environ.get("KALEDGER_TEST_PAUSE_SECONDS", "60")))


def _remove_stale_temporaries(out_path: Path) -> None:
    """Delete temporaries of earlier killed builds (safe: the caller holds the build lock)."""
    for stale in out_path.parent.glob(f".{out_path.name}.tmp-*"):
        if stale.is_dir():  # DuckDB's spill folder of a killed publish
            shutil.rmtree(stale, ignore_errors=True)
        else:
            stale.unlink(missing_ok=True)


def _input_fingerprint(keys: dict[str, str], config: dict) -> str:
    """sha256 of everything a build's output depends on: source keys, config, all code."""
    root = Path(__file__).resolve().parent
    digest = hashlib.sha256(json.dumps([sorted(keys.items()), config], sort_keys=True).encode())
    digest.update(SCHEMA_VERSION.encode() + package_version().encode())
    for path in sorted([*root.rglob("*.py"), *root.rglob("*.sql"), *root.parent.glob("schemas/*")]):
        if path.is_file():
            digest.update(path.name.encode() + path.read_bytes())
    return digest.hexdigest()


def _published_fingerprint(out_path: Path) -> str | None:
    """The ``input_fingerprint`` of the published file, or None (missing or unreadable)."""
    if not out_path.is_file():
        return None
    try:
        con = publish.open_database(out_path)
        try:
            row = con.execute(
                "SELECT value FROM build_info WHERE key = 'input_fingerprint'"
            ).fetchone()
        finally:
            con.close()
    except (duckdb.Error, OSError):
        return None
    return None if row is None else str(row[0])


def summary_from_database(out_path: Path | str) -> BuildSummary:
    """The :class:`BuildSummary` of a published database, read back from its tables."""
    out_path = Path(out_path)
    con = publish.open_database(out_path)
    try:
        per_source = con.execute(
            """SELECT s.source_id, s.row_count AS rows_read, s.accepted, s.rejected,
                      (SELECT count(*) FROM findings f WHERE f.source_id = s.source_id) AS findings
               FROM sources s ORDER BY s.source_id"""
        ).df()
        by_field = con.execute(
            "SELECT source_id, field, count(*) AS cells FROM rejects GROUP BY ALL ORDER BY ALL"
        ).df()
        severity = dict(con.execute("SELECT severity, count(*) FROM findings GROUP BY ALL").fetchall())
        (compounds,) = con.execute("SELECT count(*) FROM compounds").fetchone()
        (recommended,) = con.execute("SELECT count(*) FROM recommended").fetchone()
    finally:
        con.close()
    return BuildSummary(
        out_path=out_path,
        rows_read=int(per_source["rows_read"].sum()),
        accepted=int(per_source["accepted"].sum()),
        rejected_rows=int(per_source["rejected"].sum()),
        findings={s: int(severity.get(s, 0)) for s in ("error", "warning", "info")},
        per_source=per_source.astype({"findings": int}),
        rejects_by_field=by_field,
        compounds=int(compounds),
        recommended=int(recommended),
        up_to_date=True,
    )


def build(
    raw_dir: Path | str = DEFAULT_RAW,
    out_path: Path | str = DEFAULT_OUT,
    config_path: Path | str | None = None,
    progress: bool = False,
    force: bool = False,
    use_cache: bool = True,
) -> BuildSummary:
    """Run every stage on ``raw_dir`` and publish the database to ``out_path``.

    Incremental: a source whose descriptor, data files, the synonyms file and the stage code
    are unchanged is not read again; its kept ingest/normalize output (``build/cache/sources``
    beside the output, see :mod:`pipeline.stage_cache`) is reused and the whole-set stages
    (step inference, rules, consolidation, publish) run on all sources. When nothing at all
    changed (same inputs, config and code as the published file's ``input_fingerprint``)
    the published file is left as it is and its summary returned; ``force`` rebuilds anyway,
    ``use_cache=False`` ignores kept stage output (a clean build).

    ``progress`` shows a rich progress bar over the stages (the CLI turns it on only when
    stdout is a terminal and ``--quiet`` is not given); stage times are logged either way.
    """
    raw_dir, out_path = Path(raw_dir), Path(out_path)
    config = load_config(Path(config_path) if config_path else None)
    started = datetime.now(UTC)
    descriptors = discover_sources(raw_dir)
    with publish.build_lock(out_path), StageProgress(progress) as stages:
        _remove_stale_temporaries(out_path)
        synonyms_path = raw_dir / SYNONYMS_FILE
        synonyms_sha = stage_cache.file_sha256(synonyms_path) if synonyms_path.is_file() else None
        code = stage_cache.code_fingerprint(package_version())
        keys = {s.id: stage_cache.source_key(s, synonyms_sha, code) for s in descriptors}
        fingerprint = _input_fingerprint(keys, config)
        if not force and _published_fingerprint(out_path) == fingerprint:
            return summary_from_database(out_path)  # nothing changed: the file is up to date
        stages.begin("ingest")
        _pause_for_test("ingest")
        cache = identity.IdentityCache(out_path.parent / "cache" / "identity.parquet")
        kept = stage_cache.StageCache(out_path.parent / "cache" / "sources") if use_cache else None
        read, norm = stage_cache.ingest_and_normalize(  # normalize runs inside, per source
            descriptors, keys, load_synonyms(raw_dir), cache, kept,
            between=lambda: (stages.begin("normalize"), _pause_for_test("normalize")),
        )
        stages.begin("validate")
        _pause_for_test("validate")
        rule_findings = checks.run_rules(norm.measurements, config.get("rules", {}))
        found = pd.concat([rule_findings, norm.identity_findings], ignore_index=True)
        stages.begin("consolidate")
        _pause_for_test("consolidate")
        cell_steps = lineage.step_counts(norm.cell_facts, norm.measurements)
        cons = consolidate.consolidate(
            norm.measurements, found, read.source_files, cell_steps, **consolidate_options(config)
        )

        counts = cons.measurements.groupby("source_id").size()
        rejected = norm.rejects.drop_duplicates(["source_id", "source_row"]).groupby("source_id").size()
        sources = read.source_files.copy()
        sources["accepted"] = sources["source_id"].map(counts).fillna(0).astype("int64")
        sources["rejected"] = sources["source_id"].map(rejected).fillna(0).astype("int64")
        info = {
            "schema_version": SCHEMA_VERSION,
            "package_version": package_version(),
            "built_at": started.strftime("%Y-%m-%dT%H:%M:%SZ"),
            "pkw_release": physchem.PKW_RELEASE,
            "config": json.dumps(config, sort_keys=True),
            "input_files": json.dumps(
                dict(zip(sources["file"], sources["file_sha256"], strict=True)), sort_keys=True
            ),
            "rows_read": str(int(sources["row_count"].sum())),
            "measurements": str(len(cons.measurements)),
            "rejected_rows": str(int(sources["rejected"].sum())),
            "findings": str(len(cons.findings)),
            "recommended": str(len(cons.recommended)),
            "input_fingerprint": fingerprint,
        }
        info.update(provenance.build_manifest(  # input_sha256, stage_counts, library_versions
            {"sources": sources, "compounds": norm.compounds, "measurements": cons.measurements,
             "rejects": norm.rejects, "findings": cons.findings, "recommended": cons.recommended,
             "lineage": cons.lineage, "cell_facts": norm.cell_facts},
            raw_dir, config_path, cell_steps,
        ))
        build_info = pd.DataFrame({"key": list(info), "value": list(info.values())})
        stages.begin("publish")
        _pause_for_test("publish")
        publish.publish(
            {
                "sources": sources,
                "compounds": norm.compounds,
                "measurements": cons.measurements,
                "rejects": norm.rejects,
                "findings": cons.findings,
                "recommended": cons.recommended,
                "lineage": cons.lineage,
                "build_info": build_info,
            },
            out_path,
            cell_facts=norm.cell_facts,  # the measurements' own lineage steps, expanded in the file
        )
    per_source = sources[["source_id", "row_count", "accepted", "rejected"]].rename(
        columns={"row_count": "rows_read"}
    )
    per_source["findings"] = per_source["source_id"].map(cons.findings.groupby("source_id").size()).fillna(0).astype(int)
    by_field = norm.rejects.groupby(["source_id", "field"]).size().rename("cells").reset_index()
    return BuildSummary(
        out_path=out_path,
        rows_read=int(sources["row_count"].sum()),
        accepted=len(cons.measurements),
        rejected_rows=int(sources["rejected"].sum()),
        findings=cons.findings["severity"].value_counts().reindex(["error", "warning", "info"]).fillna(0).astype(int).to_dict(),
        per_source=per_source,
        rejects_by_field=by_field,
        compounds=len(norm.compounds),
        recommended=len(cons.recommended),
    )

"""The whole build: discover sources, run the five stages in order, publish.

Each stage is a function from tables to tables (see the stage modules); this module only
wires them together, reads the optional project config and the steward's synonyms file, and
assembles ``sources`` and ``build_info``.
"""

from __future__ import annotations

import json
import logging
import tomllib
from dataclasses import dataclass, field
from datetime import UTC, datetime
from importlib.metadata import PackageNotFoundError, version
from pathlib import Path
from time import perf_counter
from types import TracebackType

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

from pipeline import checks, consolidate, identity, ingest, normalize, provenance, publish
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

    def lines(self) -> list[str]:
        """A short human-readable account of the build, stage by stage."""
        out = [
            f"ingest      {len(self.per_source)} sources, {self.rows_read} rows read",
            f"normalize   {self.accepted} accepted, {self.rejected_rows} rejected, "
            f"{self.compounds} compounds",
            "validate    " + ", ".join(f"{n} {s}" for s, n in self.findings.items()) + " findings",
            f"consolidate {self.recommended} recommended values",
            f"publish     {self.out_path}",
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


def load_config(path: Path | None) -> dict:
    """Read the project config (``kaledger.toml``): ``[rules.<name>]`` tables of settings."""
    if path is None or not path.is_file():
        return {}
    try:
        config = tomllib.loads(path.read_text(encoding="utf-8"))
    except tomllib.TOMLDecodeError as exc:
        raise DescriptorError(path, f"is not valid TOML: {exc}") from None
    unknown = sorted(set(config) - {"rules"})
    if unknown:
        raise DescriptorError(path, f"unknown section [{unknown[0]}]; valid sections: rules")
    bad = sorted(set(config.get("rules", {})) - set(checks.RULES))
    if bad:
        raise DescriptorError(path, f"unknown rule {bad[0]!r}; rules: {', '.join(checks.RULES)}")
    return config


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


def build(
    raw_dir: Path | str = DEFAULT_RAW,
    out_path: Path | str = DEFAULT_OUT,
    config_path: Path | str | None = None,
    progress: bool = False,
) -> BuildSummary:
    """Run every stage on ``raw_dir`` and publish the database to ``out_path``.

    ``progress`` shows a rich progress bar over the stages (the CLI turns it on only when
    stdout is a terminal and ``--quiet`` is not given); stage times are logged either way.
    """
    raw_dir, out_path = Path(raw_dir), Path(out_path)
    config = load_config(Path(config_path) if config_path else None)
    started = datetime.now(UTC)
    descriptors = discover_sources(raw_dir)
    with publish.build_lock(out_path), StageProgress(progress) as stages:
        stages.begin("ingest")
        read = ingest.ingest(descriptors)
        stages.begin("normalize")
        cache = identity.IdentityCache(out_path.parent / "cache" / "identity.parquet")
        norm = normalize.normalize(read.raw_cells, read.tables, load_synonyms(raw_dir), cache)
        stages.begin("validate")
        rule_findings = checks.run_rules(norm.measurements, config.get("rules", {}))
        found = pd.concat([rule_findings, norm.identity_findings], ignore_index=True)
        stages.begin("consolidate")
        cons = consolidate.consolidate(norm.measurements, found, read.source_files, norm.lineage)

        counts = cons.measurements.groupby("source_id").size()
        rejected = norm.rejects.drop_duplicates(["source_id", "source_row"]).groupby("source_id").size()
        sources = read.source_files.copy()
        sources["accepted"] = sources["source_id"].map(counts).fillna(0).astype("int64")
        sources["rejected"] = sources["source_id"].map(rejected).fillna(0).astype("int64")
        info = {
            "schema_version": SCHEMA_VERSION,
            "package_version": package_version(),
            "built_at": started.strftime("%Y-%m-%dT%H:%M:%SZ"),
            "pkw_release": normalize.PKW_RELEASE,
            "config": json.dumps(config, sort_keys=True),
            "input_files": json.dumps(
                dict(zip(sources["file"], sources["file_sha256"], strict=True)), sort_keys=True
            ),
            "rows_read": str(int(sources["row_count"].sum())),
            "measurements": str(len(cons.measurements)),
            "rejected_rows": str(int(sources["rejected"].sum())),
            "findings": str(len(cons.findings)),
            "recommended": str(len(cons.recommended)),
        }
        info.update(provenance.build_manifest(  # input_sha256, stage_counts, library_versions
            {"sources": sources, "compounds": norm.compounds, "measurements": cons.measurements,
             "rejects": norm.rejects, "findings": cons.findings, "recommended": cons.recommended,
             "lineage": cons.lineage},
            raw_dir, config_path,
        ))
        build_info = pd.DataFrame({"key": list(info), "value": list(info.values())})
        stages.begin("publish")
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

"""Static HTML validation report of a published kaledger database.

``render(db, out_dir)`` writes ``index.html`` (sources, findings by rule and severity, rejects
grouped by reason, compounds, temperature series), one page per compound under ``compound/``
and PNG figures under ``img/``. The pages need nothing but the file system: inline CSS, no
script, no web fonts, no remote address; a Content-Security-Policy in every page forbids any
load that is not a file beside it. Every text taken from the database (which comes from
untrusted source tables) is HTML-escaped, and anchors are built from a safe alphabet.

Figures are drawn with matplotlib's Agg canvas (no display, no pyplot state). The temperature
series are fitted with :func:`pipeline.physchem.fit_van_t_hoff` (integrated van 't Hoff
equation, Clarke & Glew 1966) where a compound step has thermodynamic values at I = 0 at three
or more temperatures.
"""

from __future__ import annotations

import hashlib
import html
import logging
import re
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from pathlib import Path

import duckdb
import numpy as np
import pandas as pd
from matplotlib.axes import Axes
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure

from pipeline import checks, physchem
from pipeline.cli import CAUTION
from pipeline.publish import open_database

log = logging.getLogger(__name__)

DEFAULT_REPORT_DIR = Path("build/report")
#: Distinct temperatures a step needs before a van 't Hoff curve is fitted (2 parameters + 1).
MIN_SERIES_TEMPERATURES = 3
#: Distinct temperatures from which ΔCp° is fitted as well (3 parameters + 2 degrees of freedom).
HEAT_CAPACITY_TEMPERATURES = 5
#: Single-outlier screen of a temperature series (common practice, see _screen_one_outlier).
OUTLIER_FACTOR = 5.0
OUTLIER_FLOOR = 0.05  # [pKa units]
SEVERITY_ORDER = ("error", "warning", "info")
#: x offset of the recommended markers so they do not hide the values they summarize [K]
RECOMMENDED_OFFSET_K = 0.8
KELVIN_OFFSET = 273.15  # 0 °C in kelvin (ITS-90 definition of the Celsius scale)

_SEVERITY_COLOURS = {"error": "#b3261e", "warning": "#c77700", "info": "#3d6b8c"}
_STEP_COLOURS = ("#1f5f8b", "#c0392b", "#2e8b57", "#8e44ad", "#d35400", "#5d6d7e")
_PNG_METADATA = {"Software": None}  # no library version in the file: same input, same bytes

_CSP = "default-src 'none'; img-src 'self' data:; style-src 'unsafe-inline'"

_CSS = """
:root { --ink:#1d2329; --muted:#5b6670; --line:#d5dadf; --band:#f3f5f7; --accent:#1f5f8b; }
* { box-sizing: border-box; }
body { margin: 0; color: var(--ink); background: #fff;
       font: 15px/1.45 system-ui, -apple-system, "Segoe UI", Roboto, sans-serif; }
header { background: #17324a; color: #f4f7fa; padding: 1.2rem 2rem 1rem; }
header h1 { margin: 0 0 .3rem; font-size: 1.5rem; font-weight: 600; letter-spacing: .01em; }
header p { margin: 0; color: #c9d6e2; font-size: .9rem; }
header a { color: #e8f1f8; }
nav { padding: .5rem 2rem; background: var(--band); border-bottom: 1px solid var(--line); }
nav a { margin-right: 1.1rem; color: var(--accent); text-decoration: none; font-weight: 500; }
main { max-width: 76rem; padding: 0 2rem 3rem; }
h2 { margin: 2.2rem 0 .6rem; font-size: 1.2rem; border-bottom: 2px solid var(--accent);
     padding-bottom: .2rem; }
h3 { margin: 1.5rem 0 .4rem; font-size: 1.02rem; }
a { color: var(--accent); }
table { border-collapse: collapse; margin: .4rem 0 1rem; font-size: .86rem; }
th, td { border-bottom: 1px solid var(--line); padding: .28rem .6rem; text-align: left;
         vertical-align: top; }
th { background: var(--band); font-weight: 600; }
td.n, th.n { text-align: right; font-variant-numeric: tabular-nums; }
tr:target { background: #fff4c2; }
.scroll { overflow-x: auto; }
td code { white-space: nowrap; }
code, .mono { font-family: ui-monospace, "DejaVu Sans Mono", Menlo, monospace; font-size: .82rem; }
.caution { border-left: 5px solid #c77700; background: #fdf6ea; padding: .7rem 1rem;
           margin: 1.2rem 0; }
.sev { display: inline-block; padding: 0 .45rem; border-radius: .7rem; color: #fff;
       font-size: .75rem; font-weight: 600; }
.sev-error { background: #b3261e; } .sev-warning { background: #c77700; }
.sev-info { background: #3d6b8c; }
.muted { color: var(--muted); }
.cards { display: flex; flex-wrap: wrap; gap: .8rem; margin: 1rem 0; }
.card { border: 1px solid var(--line); border-radius: .4rem; padding: .5rem .9rem;
        min-width: 8.5rem; }
.card b { display: block; font-size: 1.35rem; }
.gallery { display: flex; flex-wrap: wrap; gap: 1rem; }
.gallery figure { margin: 0; border: 1px solid var(--line); padding: .4rem; }
figure img { max-width: 100%; height: auto; display: block; }
figcaption { font-size: .82rem; color: var(--muted); padding-top: .3rem; }
"""


# ---------------------------------------------------------------------------
# data
# ---------------------------------------------------------------------------


@dataclass(frozen=True)
class ReportData:
    """The published tables the report reads (``lineage`` is not needed)."""

    sources: pd.DataFrame
    compounds: pd.DataFrame
    measurements: pd.DataFrame
    rejects: pd.DataFrame
    findings: pd.DataFrame
    recommended: pd.DataFrame
    build_info: dict[str, str]


def load(db: Path | str) -> ReportData:
    """Read the tables of a published database (read-only)."""
    con = open_database(db)
    try:
        def q(sql: str) -> pd.DataFrame:
            return con.execute(sql).df()

        info = dict(con.execute("SELECT key, value FROM build_info").fetchall())
        return ReportData(
            sources=q("SELECT * FROM sources ORDER BY source_id"),
            compounds=q("SELECT * FROM compounds ORDER BY name, compound_id"),
            measurements=q(
                "SELECT * FROM measurements ORDER BY compound_id, step, temperature_k, source_id, source_row"
            ),
            rejects=q("SELECT * FROM rejects ORDER BY source_id, source_row, field"),
            findings=q("SELECT * FROM findings ORDER BY rule, source_id, source_row"),
            recommended=q(
                "SELECT * FROM recommended ORDER BY compound_id, step, temperature_k, ionic_strength_molal"
            ),
            build_info=info,
        )
    except duckdb.CatalogException as exc:
        raise FileNotFoundError(f"{db}: not a kaledger database ({exc})") from None
    finally:
        con.close()


def anchor(prefix: str, text: object) -> str:
    """An HTML id made of ``[A-Za-z0-9_-]`` only, unique per ``(prefix, text)``.

    Text already in that alphabet is kept as is (``kv-…`` value ids, rule names); other
    text is slugged and given a short hash so two different texts never share an id.

    Examples
    --------
    >>> anchor("rule", "ka_kb_kw")
    'rule-ka_kb_kw'
    >>> anchor("c", "unresolved:<b>x</b>")[:16]
    'c-unresolved-b-x'
    """
    s = str(text)
    if re.fullmatch(r"[A-Za-z0-9_-]+", s):
        return f"{prefix}-{s}"
    slug = re.sub(r"[^A-Za-z0-9_-]+", "-", s).strip("-")[:48]
    digest = hashlib.sha256(s.encode("utf-8")).hexdigest()[:8]
    return f"{prefix}-{slug}-{digest}"


def compound_page(compound_id: object) -> str:
    """File name (under ``compound/``) of a compound's page."""
    return anchor("c", compound_id) + ".html"


def reject_groups(rejects: pd.DataFrame) -> pd.DataFrame:
    """Add ``reason_group``: the reason with quoted cell text replaced by ``'…'``.

    Reasons echo the bad cell (``value '4,7,6' is not a number``), so rows that failed the
    same way differ only inside the quotes; the group is the reason without them.

    Examples
    --------
    >>> r = pd.DataFrame({"reason": ["value '4,7' is not a number", "value 'x' is not a number"]})
    >>> reject_groups(r)["reason_group"].nunique()
    1
    """
    out = rejects.copy()
    out["reason_group"] = out["reason"].astype(str).str.replace(r"'[^']*'", "'…'", regex=True)
    return out


@dataclass(frozen=True)
class SeriesFit:
    """A van 't Hoff fit of one compound step (thermodynamic values at I = 0).

    ``left_out`` holds the value id screened out as a single outlier (see :func:`fit_series`).
    """

    compound_id: str
    step: int | None
    fit: physchem.VantHoffFit
    temperatures_k: np.ndarray
    value_ids: tuple[str, ...]
    left_out: tuple[str, ...] = ()

    @property
    def n_values(self) -> int:
        """Values the final fit used."""
        return len(self.value_ids) - len(self.left_out)

    def curve(self, t_k: np.ndarray) -> np.ndarray:
        """Fitted pKa at temperatures ``t_k`` [K]."""
        f = self.fit
        return physchem.van_t_hoff(f.pka_ref, f.t_ref_k, t_k, f.delta_h, f.delta_cp).value


def _series_mask(m: pd.DataFrame) -> pd.Series:
    """Values that may enter a fit: thermodynamic, I = 0, status ok (no error or warning
    finding), not a bound, not a copy, inside the temperature range of the equation."""
    bound = m["qualifier"].isin(["<", ">", "<=", ">="])
    in_range = m["temperature_k"].between(physchem.T_MIN_K, physchem.T_MAX_K)
    return (
        (m["constant_type"] == "thermodynamic")
        & (m["ionic_strength_molal"] == 0)
        & (m["status"] == "ok")
        & ~bound
        & m["copy_of"].isna()
        & in_range
    )


def _fit_one(t: np.ndarray, y: np.ndarray) -> physchem.VantHoffFit:
    heat = len(np.unique(t)) >= HEAT_CAPACITY_TEMPERATURES
    return physchem.fit_van_t_hoff(t, y, with_heat_capacity=heat)


def _screen_one_outlier(t: np.ndarray, y: np.ndarray, fit: physchem.VantHoffFit) -> int | None:
    """Index of the one point to leave out, or None.

    The point with the largest residual is left out when, after a refit without it, it lies
    more than ``OUTLIER_FACTOR`` × the RMS residual of the others and more than
    ``OUTLIER_FLOOR`` pKa units from the curve (common practice: a single-outlier screen in
    the spirit of Grubbs' test, kept simple for 4-10 points).
    """
    n_par = 3 if fit.with_heat_capacity else 2
    worst = int(np.argmax(np.abs(fit.residuals)))
    keep = np.arange(len(t)) != worst
    if len(np.unique(t[keep])) <= n_par or len(np.unique(t[keep])) < MIN_SERIES_TEMPERATURES:
        return None
    refit = physchem.fit_van_t_hoff(t[keep], y[keep], with_heat_capacity=fit.with_heat_capacity)
    rms = float(np.sqrt(np.mean(refit.residuals**2)))
    at = physchem.van_t_hoff(refit.pka_ref, refit.t_ref_k, t[worst], refit.delta_h, refit.delta_cp)
    deviation = abs(float(y[worst]) - float(at.value))
    return worst if deviation > max(OUTLIER_FACTOR * rms, OUTLIER_FLOOR) else None


def fit_series(measurements: pd.DataFrame) -> dict[tuple[str, int | None], SeriesFit]:
    """Fit every compound step that has usable values at >= 3 distinct temperatures.

    Usable: see :func:`_series_mask`. ΔCp° is fitted too from
    :data:`HEAT_CAPACITY_TEMPERATURES` distinct temperatures. With at least one point more
    than the fit needs, one outlier may be screened out (:func:`_screen_one_outlier`).
    Loops over the (few) qualifying groups only; the selection is vectorized.
    """
    m = measurements[_series_mask(measurements)]
    key = m["step"].astype("float64")
    n_t = m.groupby([m["compound_id"], key], dropna=False)["temperature_k"].transform("nunique")
    m = m[n_t >= MIN_SERIES_TEMPERATURES]
    fits: dict[tuple[str, int | None], SeriesFit] = {}
    for (cid, step), g in m.groupby([m["compound_id"], m["step"].astype("float64")], dropna=False):
        step_key = None if pd.isna(step) else int(step)
        t = g["temperature_k"].to_numpy(dtype=float)
        y = g["pka"].to_numpy(dtype=float)
        ids = tuple(g["value_id"].astype(str))
        try:
            fit = _fit_one(t, y)
            worst = _screen_one_outlier(t, y, fit)
            left_out: tuple[str, ...] = ()
            if worst is not None:
                keep = np.arange(len(t)) != worst
                fit = physchem.fit_van_t_hoff(t[keep], y[keep], with_heat_capacity=fit.with_heat_capacity)
                left_out = (ids[worst],)
        except (ValueError, RuntimeError) as exc:
            log.warning("no van 't Hoff fit for %s step %s: %s", cid, step_key, exc)
            continue
        fits[(str(cid), step_key)] = SeriesFit(str(cid), step_key, fit, np.unique(t), ids, left_out)
    return fits


# ---------------------------------------------------------------------------
# HTML helpers
# ---------------------------------------------------------------------------


def _missing(x: object) -> bool:
    return x is None or (isinstance(x, float) and np.isnan(x)) or x is pd.NA or x is pd.NaT


def e(x: object) -> str:
    """Escaped text of a cell; missing values become an empty string.

    Examples
    --------
    >>> e("<script>alert(1)</script>")
    '&lt;script&gt;alert(1)&lt;/script&gt;'
    >>> e(None)
    ''
    """
    return "" if _missing(x) else html.escape(str(x), quote=True)


def _num(x: object, fmt: str = ".3f") -> str:
    return "" if _missing(x) else format(float(x), fmt)


def _step(x: object) -> str:
    return "?" if _missing(x) else str(int(x))


def _caution() -> str:
    label, sep, rest = CAUTION.partition(":")
    if sep and label.strip().lower() == "caution":
        return f"<strong>Caution:</strong>{e(rest)}"
    return e(CAUTION)


def _sev(severity: object) -> str:
    s = str(severity)
    cls = s if s in SEVERITY_ORDER else "info"
    return f'<span class="sev sev-{cls}">{e(s)}</span>'


def _table(headers: Sequence[str], rows: Iterable[str], numeric: Sequence[int] = ()) -> str:
    head = "".join(
        f'<th class="n">{h}</th>' if i in numeric else f"<th>{h}</th>" for i, h in enumerate(headers)
    )
    body = "\n".join(rows)
    return (
        f'<div class="scroll"><table><thead><tr>{head}</tr></thead><tbody>\n{body}\n'
        "</tbody></table></div>"
    )


def _tr(cells: Sequence[str], numeric: Sequence[int] = (), row_id: str | None = None) -> str:
    tds = "".join(
        f'<td class="n">{c}</td>' if i in numeric else f"<td>{c}</td>" for i, c in enumerate(cells)
    )
    rid = f' id="{row_id}"' if row_id else ""
    return f"<tr{rid}>{tds}</tr>"


def _page(title: str, header: str, nav: str, body: str) -> str:
    return f"""<!DOCTYPE html>
<html lang="en">
<head>
<meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
<meta http-equiv="Content-Security-Policy" content="{_CSP}">
<meta name="referrer" content="no-referrer">
<link rel="icon" href="data:,">
<title>{title}</title>
<style>{_CSS}</style>
</head>
<body>
<header>{header}</header>
<nav>{nav}</nav>
<main>
{body}
</main>
</body>
</html>
"""


# ---------------------------------------------------------------------------
# figures
# ---------------------------------------------------------------------------


def _save(fig: Figure, path: Path) -> None:
    FigureCanvasAgg(fig)  # attach the Agg canvas: no display, no pyplot global state
    fig.savefig(path, format="png", metadata=_PNG_METADATA)


def _sources_figure(per_source: pd.DataFrame, path: Path) -> None:
    """Rows accepted/rejected and findings by severity, one bar per source."""
    n = len(per_source)
    fig = Figure(figsize=(9.0, 0.55 * n + 1.4), dpi=100, layout="constrained")
    ax_rows, ax_find = fig.subplots(1, 2, sharey=True, width_ratios=(3, 2))
    y = np.arange(n)
    labels = per_source["source_id"].astype(str).tolist()
    acc = per_source["accepted"].to_numpy(dtype=float)
    rej = per_source["rejected"].to_numpy(dtype=float)
    ax_rows.barh(y, acc, color="#1f5f8b", label="accepted")
    ax_rows.barh(y, rej, left=acc, color="#d98c8c", label="rejected")
    ax_rows.set_yticks(y, labels)
    ax_rows.invert_yaxis()
    ax_rows.set_xlabel("rows")
    ax_rows.legend(loc="lower left", bbox_to_anchor=(0, 1.0), ncols=2, fontsize=8, frameon=False)
    left = np.zeros(n)
    for sev in SEVERITY_ORDER:
        v = per_source[sev].to_numpy(dtype=float)
        ax_find.barh(y, v, left=left, color=_SEVERITY_COLOURS[sev], label=sev)
        left += v
    ax_find.set_xlabel("findings")
    ax_find.legend(loc="lower left", bbox_to_anchor=(0, 1.0), ncols=3, fontsize=8, frameon=False)
    for ax in (ax_rows, ax_find):
        ax.spines[["top", "right"]].set_visible(False)
    _save(fig, path)


def _rules_figure(by_rule: pd.DataFrame, path: Path) -> None:
    """Findings per rule, coloured by severity."""
    n = len(by_rule)
    fig = Figure(figsize=(8.0, 0.32 * n + 1.0), dpi=100, layout="constrained")
    ax = fig.subplots()
    y = np.arange(n)
    colours = [_SEVERITY_COLOURS.get(s, "#777777") for s in by_rule["severity"]]
    ax.barh(y, by_rule["count"].to_numpy(dtype=float), color=colours)
    ax.set_yticks(y, by_rule["rule"].astype(str).tolist(), fontsize=8)
    ax.invert_yaxis()
    ax.set_xlabel("findings")
    ax.xaxis.get_major_locator().set_params(integer=True)
    ax.spines[["top", "right"]].set_visible(False)
    _save(fig, path)


def _compound_figure(
    name: str,
    m: pd.DataFrame,
    rec: pd.DataFrame,
    fits: Sequence[SeriesFit],
    path: Path,
    ax: Axes,
) -> None:
    """All values of one compound vs temperature, fitted curves and recommended values.

    Draws on ``ax`` (cleared first): one figure is reused for every compound, which saves
    building a new figure and axes each time.
    """
    ax.cla()
    fig = ax.get_figure()
    assert isinstance(fig, Figure)
    steps = sorted({_step(s) for s in m["step"]} | {_step(s) for s in rec["step"]})
    colour = {s: _STEP_COLOURS[i % len(_STEP_COLOURS)] for i, s in enumerate(steps)}
    step_of = m["step"].map(_step)
    ideal = (m["constant_type"] == "thermodynamic") & (m["ionic_strength_molal"] == 0)
    excluded = m["status"] == "excluded"
    t_c = m["temperature_k"] - KELVIN_OFFSET  # K -> °C
    for s in steps:
        sel = step_of == s
        c = colour[s]
        groups = (
            (sel & ideal & ~excluded, "o", c, f"step {s}, I = 0"),
            (sel & ~ideal & ~excluded, "^", "none", f"step {s}, I > 0 or not thermodynamic"),
            (sel & excluded, "x", c, f"step {s}, excluded"),
        )
        for mask, marker, face, label in groups:
            if not mask.any():
                continue
            u = m.loc[mask, "pka_uncertainty"].to_numpy(dtype=float)
            style = {"color": c, "mfc": face, "mec": c, "ms": 6, "label": label, "alpha": 0.9}
            if np.isnan(u).all():  # no error bars to draw: a plain marker plot is much cheaper
                ax.plot(t_c[mask], m.loc[mask, "pka"], marker, **style)
            else:
                ax.errorbar(t_c[mask], m.loc[mask, "pka"], yerr=np.nan_to_num(u), fmt=marker,
                            capsize=2, lw=0.8, **style)
    left_out = m["value_id"].isin([v for f in fits for v in f.left_out])
    if left_out.any():
        ax.plot(
            t_c[left_out], m.loc[left_out, "pka"], "o", ms=13, mfc="none", mec="#b3261e", mew=1.4,
            label="left out of the fit (outlier)",
        )
    for f in fits:
        lo = max(f.temperatures_k.min() - 3.0, physchem.T_MIN_K)
        hi = min(f.temperatures_k.max() + 3.0, physchem.T_MAX_K)
        grid = np.linspace(lo, hi, 120)
        ax.plot(
            grid - KELVIN_OFFSET, f.curve(grid), color=colour.get(_step(f.step), "#333"), lw=1.4,
            label=f"van 't Hoff fit, step {_step(f.step)}",
        )
    if not rec.empty:
        rec_ideal = (rec["constant_type"] == "thermodynamic") & (rec["ionic_strength_molal"] == 0)
        x = rec["temperature_k"] + RECOMMENDED_OFFSET_K - KELVIN_OFFSET  # K -> °C, shifted right
        for mask, face, label in (
            (rec_ideal, "#ffd34d", "recommended ± u, I = 0"),
            (~rec_ideal, "none", "recommended ± u, other conditions"),
        ):
            if not mask.any():
                continue
            u = rec.loc[mask, "pka_uncertainty"].to_numpy(dtype=float)
            ax.errorbar(
                x[mask], rec.loc[mask, "pka"], yerr=np.where(np.isnan(u), 0.0, u),
                fmt="D", color="#111111", mfc=face, ms=5.5, capsize=3, lw=1.0,
                label=label, zorder=5,
            )
    ax.set_xlabel("temperature [°C]")
    ax.set_ylabel("pKa")
    ax.set_title(name, fontsize=11)
    ax.grid(True, color="#e3e7eb", lw=0.6)
    ax.spines[["top", "right"]].set_visible(False)
    ax.legend(fontsize=7, loc="center left", bbox_to_anchor=(1.01, 0.5), frameon=False)
    _save(fig, path)


# ---------------------------------------------------------------------------
# pages
# ---------------------------------------------------------------------------


def _per_source(data: ReportData) -> pd.DataFrame:
    s = data.sources
    counts = (
        data.findings.groupby(["source_id", "severity"]).size().unstack(fill_value=0)
        .reindex(columns=list(SEVERITY_ORDER), fill_value=0)
    )
    out = s[["source_id", "title", "kind", "license", "row_count", "accepted", "rejected"]].copy()
    out = out.join(counts, on="source_id").fillna({k: 0 for k in SEVERITY_ORDER})
    for k in SEVERITY_ORDER:
        out[k] = out[k].astype("int64")
    out["findings"] = out[list(SEVERITY_ORDER)].sum(axis=1)
    return out


def _value_links(data: ReportData, prefix: str) -> pd.Series:
    """value_id -> href of its row on its compound page."""
    m = data.measurements
    return pd.Series(
        [f"{prefix}{compound_page(c)}#{anchor('v', v)}" for c, v in zip(m["compound_id"], m["value_id"], strict=True)],
        index=m["value_id"].to_numpy(),
    )


def _compound_names(data: ReportData) -> dict[str, str]:
    c = data.compounds
    names = c["name"].where(c["name"].notna(), c["compound_id"])
    return dict(zip(c["compound_id"].astype(str), names.astype(str), strict=True))


def _index_body(
    data: ReportData,
    per_source: pd.DataFrame,
    fits: dict[tuple[str, int | None], SeriesFit],
    has_rules_figure: bool,
) -> str:
    names = _compound_names(data)
    value_href = _value_links(data, "compound/")
    known_pages = set(data.compounds["compound_id"].astype(str)) | set(
        data.measurements["compound_id"].astype(str)
    )
    parts: list[str] = []
    info = data.build_info
    cards = (
        ("sources", len(data.sources)), ("rows read", int(data.sources["row_count"].sum())),
        ("measurements", len(data.measurements)),
        ("rejected rows", int(data.sources["rejected"].sum())),
        ("findings", len(data.findings)), ("compounds", len(data.compounds)),
        ("recommended", len(data.recommended)),
    )
    parts.append(
        '<div class="cards">'
        + "".join(f'<div class="card"><b>{n}</b><span class="muted">{e(k)}</span></div>' for k, n in cards)
        + "</div>"
    )
    parts.append(f'<p class="caution" id="caution">{_caution()}</p>')
    parts.append(
        '<p class="muted">Built '
        f"{e(info.get('built_at', '?'))} by kaledger {e(info.get('package_version', '?'))}, "
        f"schema {e(info.get('schema_version', '?'))}, pKw from {e(info.get('pkw_release', '?'))}.</p>"
    )

    # sources
    parts.append('<h2 id="sources">Sources</h2>')
    parts.append(
        '<figure><img src="img/sources.png" alt="rows and findings per source" width="900">'
        "<figcaption>Rows accepted and rejected, and findings by severity, per source."
        "</figcaption></figure>"
    )
    rows = [
        _tr(
            [
                f"<code>{e(r.source_id)}</code>", e(r.title), e(r.kind), e(r.license),
                str(r.row_count), str(r.accepted), str(r.rejected),
                f'<a href="#findings-by-source">{r.findings}</a>' if r.findings else "0",
                str(r.error), str(r.warning), str(r.info),
            ],
            numeric=range(4, 11),
            row_id=anchor("source", r.source_id),
        )
        for r in per_source.itertuples()
    ]
    parts.append(
        _table(
            ["source", "title", "kind", "licence", "rows read", "accepted", "rejected",
             "findings", "error", "warning", "info"],
            rows, numeric=range(4, 11),
        )
    )
    cite_rows = [
        _tr([f'<a href="#{anchor("source", r.source_id)}"><code>{e(r.source_id)}</code></a>',
             e(r.citation), f'<span class="mono">{e(r.url)}</span>', e(r.retrieved),
             f'<span class="mono">{e(r.file)}</span><br><span class="mono muted" title="{e(r.file_sha256)}">sha256 {e(str(r.file_sha256)[:16])}…</span>'])
        for r in data.sources.itertuples()
    ]
    parts.append("<h3>Citations and files</h3>")
    parts.append(_table(["source", "citation", "address", "retrieved", "file"], cite_rows))

    # findings
    f = data.findings
    parts.append('<h2 id="findings">Findings by rule and severity</h2>')
    if f.empty:
        parts.append("<p>No rule fired.</p>")
    else:
        by_rule = f.groupby(["rule", "severity"]).size().rename("count").reset_index()
        by_rule["sev_rank"] = by_rule["severity"].map({s: i for i, s in enumerate(SEVERITY_ORDER)})
        by_rule = by_rule.sort_values(["sev_rank", "rule"]).reset_index(drop=True)
        if has_rules_figure:
            parts.append(
                '<figure><img src="img/findings.png" alt="findings per rule" width="800">'
                "<figcaption>Findings per rule, coloured by severity.</figcaption></figure>"
            )
        rows = [
            _tr(
                [f'<a href="#{anchor("rule", r.rule)}"><code>{e(r.rule)}</code></a>', _sev(r.severity),
                 str(r.count), e(checks.RULES[r.rule].description) if r.rule in checks.RULES else ""],
                numeric=(2,),
            )
            for r in by_rule.itertuples()
        ]
        parts.append(_table(["rule", "severity", "findings", "what it checks"], rows, numeric=(2,)))

        pivot = (
            f.groupby(["source_id", "severity"]).size().unstack(fill_value=0)
            .reindex(columns=list(SEVERITY_ORDER), fill_value=0)
        )
        parts.append('<h3 id="findings-by-source">Findings by source</h3>')
        parts.append(
            _table(
                ["source", *SEVERITY_ORDER],
                [
                    _tr([f'<a href="#{anchor("source", sid)}"><code>{e(sid)}</code></a>',
                         *(str(int(v)) for v in vals)], numeric=(1, 2, 3))
                    for sid, vals in zip(pivot.index, pivot.to_numpy(), strict=True)
                ],
                numeric=(1, 2, 3),
            )
        )
        for rule_name, g in f.groupby("rule", sort=True):
            parts.append(
                f'<h3 id="{anchor("rule", rule_name)}"><code>{e(rule_name)}</code> '
                f"<span class=\"muted\">({len(g)})</span></h3>"
            )
            rows = []
            for r in g.itertuples():
                cid = "" if _missing(r.compound_id) else str(r.compound_id)
                if not _missing(r.value_id) and r.value_id in value_href.index:
                    value_cell = f'<a href="{e(value_href[r.value_id])}"><code>{e(r.value_id)}</code></a>'
                else:
                    value_cell = f"<code>{e(r.value_id)}</code>"
                if cid and cid in known_pages:
                    compound_cell = f'<a href="compound/{compound_page(cid)}">{e(names.get(cid, cid))}</a>'
                else:
                    compound_cell = e(cid)
                source_cell = (
                    f'<a href="#{anchor("source", r.source_id)}"><code>{e(r.source_id)}</code></a>'
                    if not _missing(r.source_id) else ""
                )
                row_no = "" if _missing(r.source_row) else str(int(r.source_row))
                rows.append(
                    _tr([_sev(r.severity), source_cell, row_no, compound_cell, value_cell, e(r.message)],
                        numeric=(2,))
                )
            parts.append(_table(["severity", "source", "row", "compound", "value", "message"], rows, numeric=(2,)))

    # rejects
    rj = reject_groups(data.rejects)
    parts.append('<h2 id="rejects">Rejected rows, grouped by reason</h2>')
    if rj.empty:
        parts.append("<p>No row was rejected.</p>")
    else:
        counts = rj.groupby(["field", "reason_group"]).size().rename("cells").reset_index()
        counts = counts.sort_values(["cells", "field", "reason_group"], ascending=[False, True, True])
        counts["id"] = [anchor("reject", f"{a}|{b}") for a, b in zip(counts["field"], counts["reason_group"], strict=True)]
        parts.append(
            _table(
                ["field", "reason", "cells"],
                [_tr([e(r.field), f'<a href="#{r.id}">{e(r.reason_group)}</a>', str(r.cells)], numeric=(2,))
                 for r in counts.itertuples()],
                numeric=(2,),
            )
        )
        for r in counts.itertuples():
            g = rj[(rj["field"] == r.field) & (rj["reason_group"] == r.reason_group)]
            parts.append(f'<h3 id="{r.id}">{e(r.field)}: {e(r.reason_group)}</h3>')
            parts.append(
                _table(
                    ["source", "row", "cell text", "reason"],
                    [
                        _tr([f'<a href="#{anchor("source", x.source_id)}"><code>{e(x.source_id)}</code></a>',
                             str(int(x.source_row)), f"<code>{e(x.raw_text)}</code>", e(x.reason)],
                            numeric=(1,))
                        for x in g.itertuples()
                    ],
                    numeric=(1,),
                )
            )

    # temperature series
    parts.append('<h2 id="series">Temperature series</h2>')
    if not fits:
        parts.append(f"<p>No compound step has values at {MIN_SERIES_TEMPERATURES} or more temperatures.</p>")
    else:
        parts.append(
            f"<p>Steps with thermodynamic values at I = 0 at {MIN_SERIES_TEMPERATURES} or more "
            "temperatures, fitted with the integrated van 't Hoff equation (ΔH°; ΔCp° as well "
            f"from {HEAT_CAPACITY_TEMPERATURES} temperatures).</p>"
        )
        figs = []
        for cid in sorted({k[0] for k in fits}, key=lambda c: names.get(c, c)):
            page = compound_page(cid)
            img = page.removesuffix(".html") + ".png"
            figs.append(
                f'<figure><a href="compound/{page}"><img src="img/{img}" width="432" '
                f'alt="pKa against temperature, {e(names.get(cid, cid))}"></a>'
                f"<figcaption>{e(names.get(cid, cid))}</figcaption></figure>"
            )
        parts.append('<div class="gallery">' + "".join(figs) + "</div>")

    # compounds
    parts.append('<h2 id="compounds">Compounds</h2>')
    m = data.measurements
    per_c = m.groupby("compound_id").agg(
        values=("value_id", "size"), temperatures=("temperature_k", "nunique"),
        sources=("source_id", "nunique"),
    )
    n_rec = data.recommended.groupby("compound_id").size()
    n_find = f.groupby("compound_id").size() if not f.empty else pd.Series(dtype="int64")
    series_c = {k[0] for k in fits}
    rows = []
    for c in data.compounds.itertuples():
        cid = str(c.compound_id)
        pc = per_c.loc[cid] if cid in per_c.index else None
        rows.append(
            _tr(
                [
                    f'<a href="compound/{compound_page(cid)}">{e(names.get(cid, cid))}</a>',
                    f"<code>{e(cid)}</code>", e(c.formula),
                    str(int(pc["values"])) if pc is not None else "0",
                    str(int(pc["sources"])) if pc is not None else "0",
                    str(int(pc["temperatures"])) if pc is not None else "0",
                    str(int(n_rec.get(cid, 0))), str(int(n_find.get(cid, 0))),
                    "fitted" if cid in series_c else "",
                ],
                numeric=range(3, 8),
                row_id=anchor("compound", cid),
            )
        )
    parts.append(
        _table(["compound", "compound id", "formula", "values", "sources", "temperatures",
                "recommended", "findings", "series"], rows, numeric=range(3, 8))
    )
    return "\n".join(parts)


def _compound_body(
    data: ReportData,
    cid: str,
    name: str,
    m: pd.DataFrame,
    rec: pd.DataFrame,
    fits: Sequence[SeriesFit],
    img: str,
    findings_by_value: dict[str, list[tuple[str, str]]],
) -> str:
    parts: list[str] = []
    comp = data.compounds[data.compounds["compound_id"] == cid]
    if not comp.empty:
        c = comp.iloc[0]
        parts.append(
            _table(
                ["compound id", "InChIKey", "SMILES", "CAS", "formula", "resolved by"],
                [_tr([f"<code>{e(cid)}</code>", f"<code>{e(c['inchikey'])}</code>",
                      f"<code>{e(c['smiles'])}</code>", e(c["cas"]), e(c["formula"]), e(c["resolved_by"])])],
            )
        )
    parts.append(f'<p class="caution">{_caution()}</p>')
    parts.append(
        f'<figure><img src="../img/{img}" width="720" alt="pKa against temperature, {e(name)}">'
        "<figcaption>All values against temperature: filled circles thermodynamic at I = 0, "
        "open triangles other conditions, crosses excluded by an error finding, a red ring a "
        "value left out of the fit as an outlier; lines the van 't Hoff fits; diamonds the "
        f"recommended values with their uncertainty, drawn {RECOMMENDED_OFFSET_K} K to the right "
        "of their temperature so that they do not hide the values.</figcaption></figure>"
    )

    if fits:
        parts.append('<h2 id="fit">Van \'t Hoff fits</h2>')
        rows = []
        for sf in fits:
            f = sf.fit
            se = f.standard_errors
            rows.append(
                _tr(
                    [_step(sf.step), str(sf.n_values), str(len(sf.temperatures_k)),
                     f"{sf.temperatures_k.min() - KELVIN_OFFSET:.1f} – {sf.temperatures_k.max() - KELVIN_OFFSET:.1f}",
                     f"{f.pka_ref:.3f} ± {se[0]:.3f}",
                     f"{f.delta_h / 1000:.1f} ± {se[1] / 1000:.1f}",  # J/mol -> kJ/mol
                     f"{f.delta_cp:.0f} ± {se[2]:.0f}" if f.with_heat_capacity else "not fitted",
                     f"{np.max(np.abs(f.residuals)):.3f}",
                     " ".join(f'<a href="#{anchor("v", v)}"><code>{e(v)}</code></a>' for v in sf.left_out)],
                    numeric=range(0, 8),
                )
            )
        parts.append(
            _table(["step", "values", "temperatures", "range [°C]", "pKa at 25 °C",
                    "ΔH° [kJ/mol]", "ΔCp° [J/(K mol)]", "max |residual|", "left out"],
                   rows, numeric=range(0, 8))
        )
        parts.append(
            "<p class=\"muted\">Fitted to thermodynamic values at I = 0 with status ok (no error "
            "or warning finding), bounds and copies left aside; one outlier may be left out when "
            f"it lies more than {OUTLIER_FACTOR:g} × the RMS residual of the others and more than "
            f"{OUTLIER_FLOOR:g} from their curve. Uncertainties are standard errors of the fit.</p>"
        )

    parts.append('<h2 id="recommended">Recommended values</h2>')
    if rec.empty:
        parts.append("<p>None: no usable value for this compound.</p>")
    else:
        parts.append(
            _table(
                ["step", "T [°C]", "I [mol/kg]", "constant type", "pKa", "u", "values", "sources",
                 "method", "Birge ratio", "category", "reason"],
                [
                    _tr([_step(r.step), _num(r.temperature_k - KELVIN_OFFSET, ".1f"),
                         _num(r.ionic_strength_molal, ".3g"), e(r.constant_type), _num(r.pka),
                         _num(r.pka_uncertainty, ".2g"), str(r.n_values), str(r.n_sources),
                         e(r.method), _num(r.birge_ratio, ".2f"), f"<strong>{e(r.category)}</strong>",
                         e(r.reason)],
                        numeric=(1, 2, 4, 5, 6, 7, 9),
                        row_id=anchor("r", r.recommendation_id))
                    for r in rec.itertuples()
                ],
                numeric=(1, 2, 4, 5, 6, 7, 9),
            )
        )

    parts.append('<h2 id="values">All values</h2>')
    fit_of = {sf.step: sf for sf in fits}
    resid = pd.Series(np.nan, index=m.index)
    ideal = (  # residuals for every value at the fitted conditions, excluded ones included
        (m["constant_type"] == "thermodynamic") & (m["ionic_strength_molal"] == 0)
        & m["temperature_k"].between(physchem.T_MIN_K, physchem.T_MAX_K)
    )
    for step_key, sf in fit_of.items():
        sel = ideal & (m["step"].isna() if step_key is None else (m["step"] == step_key))
        if sel.any():
            resid[sel] = m.loc[sel, "pka"] - sf.curve(m.loc[sel, "temperature_k"].to_numpy(dtype=float))
    left_out = {v for sf in fits for v in sf.left_out}
    ids_here = set(m["value_id"].astype(str))
    rows = []
    for r, res in zip(m.itertuples(), resid, strict=True):
        fl = findings_by_value.get(str(r.value_id), [])
        flags = " ".join(
            f'<a href="../index.html#{anchor("rule", rule)}">{_sev(sev)} <code>{e(rule)}</code></a>'
            for rule, sev in fl
        )
        copy = (
            f'<a href="#{anchor("v", r.copy_of)}"><code>{e(r.copy_of)}</code></a>'
            if not _missing(r.copy_of) and str(r.copy_of) in ids_here
            else f"<code>{e(r.copy_of)}</code>"
        )
        rows.append(
            _tr(
                [f"<code>{e(r.value_id)}</code>",
                 f'<a href="../index.html#{anchor("source", r.source_id)}"><code>{e(r.source_id)}</code></a>',
                 str(int(r.source_row)), _step(r.step), _num(r.temperature_k - KELVIN_OFFSET, ".1f"),
                 _num(r.ionic_strength_molal, ".3g"), e(r.constant_type),
                 e(r.qualifier) + _num(r.pka), _num(r.pka_uncertainty, ".2g"),
                 _num(res, "+.3f") + (" <strong>left out</strong>" if r.value_id in left_out else ""),
                 f"{e(r.quantity_reported)} <code>{e(r.value_reported)}</code>",
                 e(r.reference), e(r.status), copy, flags],
                numeric=(2, 4, 5, 7, 8, 9),
                row_id=anchor("v", r.value_id),
            )
        )
    parts.append(
        _table(
            ["value id", "source", "row", "step", "T [°C]", "I [mol/kg]", "constant type", "pKa",
             "u", "residual", "as reported", "reference", "status", "copy of", "findings"],
            rows, numeric=(2, 4, 5, 7, 8, 9),
        )
    )
    return "\n".join(parts)


def render(db: Path | str, out_dir: Path | str = DEFAULT_REPORT_DIR) -> Path:
    """Write the HTML report of the database ``db`` into ``out_dir``; return ``index.html``.

    ``out_dir`` gets ``index.html``, ``compound/<id>.html`` and ``img/*.png``. Pages and
    figures left there by an earlier report that this one does not write are removed (only
    ``*.html`` in ``compound/`` and ``*.png`` in ``img/``; nothing else is touched).
    """
    data = load(db)
    out = Path(out_dir)
    (out / "compound").mkdir(parents=True, exist_ok=True)
    (out / "img").mkdir(parents=True, exist_ok=True)
    written: set[Path] = set()

    per_source = _per_source(data)
    _sources_figure(per_source, out / "img" / "sources.png")
    written.add(out / "img" / "sources.png")
    has_rules_figure = not data.findings.empty
    if has_rules_figure:
        by_rule = data.findings.groupby(["rule", "severity"]).size().rename("count").reset_index()
        by_rule["sev_rank"] = by_rule["severity"].map({s: i for i, s in enumerate(SEVERITY_ORDER)})
        _rules_figure(by_rule.sort_values(["sev_rank", "rule"]), out / "img" / "findings.png")
        written.add(out / "img" / "findings.png")

    fits = fit_series(data.measurements)
    names = _compound_names(data)
    f = data.findings[data.findings["value_id"].notna()]
    findings_by_value: dict[str, list[tuple[str, str]]] = {}
    for vid, rule, sev in zip(f["value_id"].astype(str), f["rule"], f["severity"], strict=True):
        findings_by_value.setdefault(vid, []).append((str(rule), str(sev)))

    m_by_c = dict(tuple(data.measurements.groupby("compound_id", sort=False)))
    r_by_c = dict(tuple(data.recommended.groupby("compound_id", sort=False)))
    empty_m, empty_r = data.measurements.iloc[0:0], data.recommended.iloc[0:0]
    compound_ids = list(dict.fromkeys([*data.compounds["compound_id"].astype(str), *m_by_c]))
    fig = Figure(figsize=(7.2, 4.0), dpi=100)
    # fixed margins (legend on the right): constrained layout would draw every figure twice
    fig.subplots_adjust(left=0.09, right=0.66, bottom=0.12, top=0.92)
    ax = fig.subplots()
    for cid in compound_ids:
        name = names.get(cid, cid)
        m = m_by_c.get(cid, empty_m)
        rec = r_by_c.get(cid, empty_r)
        c_fits = [sf for (c, _), sf in sorted(fits.items(), key=lambda kv: _step(kv[0][1])) if c == cid]
        page = compound_page(cid)
        img = page.removesuffix(".html") + ".png"
        _compound_figure(name, m, rec, c_fits, out / "img" / img, ax)
        written.add(out / "img" / img)
        header = (
            f'<h1>{e(name)}</h1><p><a href="../index.html">kaledger validation report</a> · '
            f"<code>{e(cid)}</code></p>"
        )
        nav = (
            '<a href="../index.html#compounds">all compounds</a>'
            + ('<a href="#fit">fit</a>' if c_fits else "")
            + '<a href="#recommended">recommended</a><a href="#values">values</a>'
        )
        body = _compound_body(data, cid, name, m, rec, c_fits, img, findings_by_value)
        path = out / "compound" / page
        path.write_text(_page(f"{e(name)} · kaledger report", header, nav, body), encoding="utf-8")
        written.add(path)

    header = (
        "<h1>kaledger validation report</h1>"
        f"<p>database <code>{e(Path(db).name)}</code> · {len(data.sources)} sources · "
        f"{len(data.measurements)} values · {len(data.findings)} findings</p>"
    )
    nav = "".join(
        f'<a href="#{a}">{t}</a>'
        for a, t in (("sources", "sources"), ("findings", "findings"), ("rejects", "rejects"),
                     ("series", "temperature series"), ("compounds", "compounds"))
    )
    index = out / "index.html"
    index.write_text(
        _page("kaledger validation report", header, nav, _index_body(data, per_source, fits, has_rules_figure)),
        encoding="utf-8",
    )
    for stale in [*(out / "compound").glob("*.html"), *(out / "img").glob("*.png")]:
        if stale not in written:
            stale.unlink()
    log.info("report: %d pages, %d figures in %s", len(compound_ids) + 1,
             sum(p.suffix == ".png" for p in written), out)
    return index

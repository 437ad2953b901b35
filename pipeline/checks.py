"""Chemistry rules over normalized measurements, collected into ``findings``.

Each rule is a small registered function ``measurements -> (mask or frame of value_id, message)``
with a name, a severity and a one-line description. The engine runs every enabled rule and
collects all failures (it never stops at the first), like a lazy validation. Severity:

- ``error``: the value stays in ``measurements`` (status ``excluded``) but not in ``recommended``;
- ``warning``: the value is used, with the flag (status ``flagged``);
- ``info``: advice.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from pipeline.schemas.tables import FINDINGS, SEVERITIES

#: pKa of H3O+ and of H2O on the 55.5 mol/L water convention: values outside are levelled by
#: water and cannot be measured there directly (common practice; e.g. Perrin, *Dissociation
#: Constants of Organic Bases in Aqueous Solution*, 1965, introduction).
PKA_LEVELLING_LOW = -1.74
PKA_LEVELLING_HIGH = 15.74
#: Beyond these a pKa is not a physical aqueous value at all (common practice).
PKA_PHYSICAL_LOW = -15.0
PKA_PHYSICAL_HIGH = 35.0


@dataclass(frozen=True)
class RuleResult:
    value_id: pd.Series
    message: pd.Series


RuleFunction = Callable[[pd.DataFrame, dict], RuleResult]


@dataclass(frozen=True)
class Rule:
    name: str
    severity: str
    description: str
    function: RuleFunction = field(repr=False)


RULES: dict[str, Rule] = {}


def rule(name: str, severity: str, description: str) -> Callable[[RuleFunction], RuleFunction]:
    """Register a rule under ``name``."""
    if severity not in SEVERITIES:
        raise ValueError(f"severity {severity!r} is not one of {', '.join(SEVERITIES)}")

    def register(function: RuleFunction) -> RuleFunction:
        RULES[name] = Rule(name, severity, description, function)
        return function

    return register


def _result(m: pd.DataFrame, mask: pd.Series, message: pd.Series | str) -> RuleResult:
    mask = mask.fillna(False).astype(bool)
    if isinstance(message, str):
        message = pd.Series(message, index=m.index)
    return RuleResult(m.loc[mask, "value_id"], message[mask].astype(str))


def _fmt(x: pd.Series, digits: int = 3) -> pd.Series:
    return x.round(digits).astype(str)


@rule("pka_physical_bounds", "error", "pKa outside any physical aqueous value (-15 to 35)")
def _physical_bounds(m: pd.DataFrame, config: dict) -> RuleResult:
    low = config.get("physical_low", PKA_PHYSICAL_LOW)
    high = config.get("physical_high", PKA_PHYSICAL_HIGH)
    bad = (m["pka"] < low) | (m["pka"] > high)
    return _result(m, bad, "pKa " + _fmt(m["pka"]) + f" is outside the physical bounds {low} to {high}")


@rule(
    "pka_outside_water_range",
    "warning",
    "pKa below pKa(H3O+) = -1.74 or above pKa(H2O) = 15.74 cannot be measured in water",
)
def _water_range(m: pd.DataFrame, config: dict) -> RuleResult:
    inside_physical = m["pka"].between(PKA_PHYSICAL_LOW, PKA_PHYSICAL_HIGH)
    bad = inside_physical & ((m["pka"] < PKA_LEVELLING_LOW) | (m["pka"] > PKA_LEVELLING_HIGH))
    return _result(
        m,
        bad,
        "pKa " + _fmt(m["pka"]) + " lies outside the range water allows (-1.74 to 15.74); "
        "it must be an extrapolated or non-aqueous value",
    )


@rule("implausible_precision", "warning", "more decimals or a smaller uncertainty than any method gives")
def _precision(m: pd.DataFrame, config: dict) -> RuleResult:
    max_decimals = config.get("max_decimals", 4)
    text = m["value_reported"].astype(str)
    # digits after the decimal mark of the first number in a pK-type cell
    decimals = text.str.extract(r"\d[.,](\d+)", expand=False).str.len().fillna(0)
    pk_type = m["quantity_reported"].isin(["pKa", "pKb", "logK"])
    too_many = pk_type & (decimals > max_decimals)
    too_small = m["pka_uncertainty"].notna() & (m["pka_uncertainty"] < config.get("min_uncertainty", 1e-4))
    msg = pd.Series("", index=m.index)
    msg = msg.where(~too_many, "value '" + text + "' has " + decimals.astype(int).astype(str)
                    + f" decimals; no pKa method resolves more than {max_decimals}")
    msg = msg.where(~too_small | too_many, "uncertainty " + m["pka_uncertainty"].astype(str)
                    + " is smaller than any pKa method achieves")
    return _result(m, too_many | too_small, msg)


@rule("implausible_uncertainty", "warning", "an uncertainty larger than 1 pK unit says nothing")
def _large_uncertainty(m: pd.DataFrame, config: dict) -> RuleResult:
    limit = config.get("max_uncertainty", 1.0)
    bad = m["pka_uncertainty"] > limit
    return _result(m, bad, "uncertainty ± " + _fmt(m["pka_uncertainty"]) + f" pK units exceeds {limit}")


@rule("non_aqueous_solvent", "info", "value measured in a mixed or non-aqueous solvent")
def _non_aqueous(m: pd.DataFrame, config: dict) -> RuleResult:
    bad = m["solvent"] != "water"
    return _result(m, bad, "solvent is " + m["solvent"].astype(str) + ", not water; kept apart from aqueous values")


@rule("bounded_value", "info", "value reported only as a bound or an approximation")
def _bounded(m: pd.DataFrame, config: dict) -> RuleResult:
    bad = m["qualifier"].notna()
    return _result(m, bad, "value is reported as '" + m["qualifier"].astype(str) + " " + _fmt(m["pka"])
                   + "'; bounds are kept but not averaged")


@rule(
    "conditions_outside_model_range",
    "warning",
    "temperature outside 0-100 °C or ionic strength above 0.5 mol/kg (Davies) at which activity and "
    "temperature models are not valid",
)
def _conditions(m: pd.DataFrame, config: dict) -> RuleResult:
    t_bad = ~m["temperature_k"].between(273.15, 373.15)
    i_bad = m["ionic_strength_molal"] > config.get("max_ionic_strength", 0.5)
    msg = ("T = " + _fmt(m["temperature_k"], 2) + " K, I = " + _fmt(m["ionic_strength_molal"])
           + " mol/kg lie outside the range of the activity and temperature models")
    return _result(m, t_bad | i_bad, msg)


def _condition_key(m: pd.DataFrame) -> pd.DataFrame:
    return pd.DataFrame(
        {
            "compound_id": m["compound_id"],
            "t": m["temperature_k"].round(1),
            "i": m["ionic_strength_molal"].round(3),
            "ctype": m["constant_type"],
        },
        index=m.index,
    )


@rule("polyprotic_order", "warning", "successive pKa steps of one acid must increase (pKa1 < pKa2 < ...)")
def _step_order(m: pd.DataFrame, config: dict) -> RuleResult:
    key = _condition_key(m)
    key["source_id"] = m["source_id"]
    has_step = m["step"].notna() & m["qualifier"].isna()
    frame = pd.concat([key, m[["step", "pka"]]], axis=1)[has_step].sort_values(
        ["compound_id", "source_id", "t", "i", "ctype", "step"]
    )
    group = ["compound_id", "source_id", "t", "i", "ctype"]
    previous = frame.groupby(group)["pka"].shift(1)
    previous_step = frame.groupby(group)["step"].shift(1)
    # equal step numbers are duplicates, not an order problem; compare successive steps only
    bad = previous.notna() & (previous_step < frame["step"]) & (frame["pka"] <= previous)
    msg = ("pKa" + frame["step"].astype(str) + " = " + _fmt(frame["pka"]) + " is not above pKa"
           + previous_step.astype(str) + " = " + _fmt(previous) + " from the same source")
    return _result(m.loc[frame.index], bad, msg)


@rule("ka_kb_kw", "warning", "a pKa and a pKb of one conjugate pair at the same conditions must sum to pKw")
def _ka_kb_kw(m: pd.DataFrame, config: dict) -> RuleResult:
    key = _condition_key(m)
    key["step"] = m["step"].fillna(0)
    from_base = m["quantity_reported"].isin(["pKb", "Kb"])
    frame = pd.concat([key, m[["pka", "pka_uncertainty", "pkw_used"]]], axis=1)
    frame = frame[m["qualifier"].isna()]
    group = ["compound_id", "t", "i", "ctype", "step"]
    direct = frame[~from_base[frame.index]].groupby(group).agg(
        pka_direct=("pka", "median"), u_direct=("pka_uncertainty", "max")
    )
    via_base = frame[from_base[frame.index]].join(direct, on=group, how="inner")
    u = np.sqrt(via_base["pka_uncertainty"].fillna(0.02) ** 2 + via_base["u_direct"].fillna(0.02) ** 2)
    tolerance = np.maximum(config.get("min_tolerance", 0.1), 3 * u)
    diff = (via_base["pka"] - via_base["pka_direct"]).abs()
    bad = diff > tolerance
    pkb = via_base["pkw_used"] - via_base["pka"]
    msg = ("pKb " + _fmt(pkb) + " + pKa " + _fmt(via_base["pka_direct"]) + " = " + _fmt(pkb + via_base["pka_direct"])
           + " but pKw = " + _fmt(via_base["pkw_used"]) + " at these conditions (IAPWS R11-24); "
           "off by " + _fmt(diff) + ", tolerance " + _fmt(tolerance))
    return _result(m.loc[via_base.index], bad, msg)


def run_rules(measurements: pd.DataFrame, config: dict | None = None) -> pd.DataFrame:
    """Run every enabled rule; return all findings (schema ``FINDINGS``).

    ``config`` maps a rule name to its settings; ``{"enabled": False}`` switches a rule off and
    other keys set its tolerances.
    """
    config = config or {}
    frames: list[pd.DataFrame] = []
    for name, r in RULES.items():
        settings = config.get(name, {})
        if not settings.get("enabled", True):
            continue
        result = r.function(measurements, settings)
        frames.append(pd.DataFrame({"rule": name, "severity": settings.get("severity", r.severity),
                                    "value_id": result.value_id, "message": result.message}))
    return attach_locations(pd.concat(frames, ignore_index=True), measurements)


def attach_locations(findings: pd.DataFrame, measurements: pd.DataFrame) -> pd.DataFrame:
    """Add compound, source and row of each finding's value; order columns as the schema."""
    where = measurements.set_index("value_id")[["compound_id", "source_id", "source_row"]]
    located = findings.drop(columns=[c for c in where.columns if c in findings.columns]).join(
        where, on="value_id"
    )
    if "compound_id" in findings.columns:
        located["compound_id"] = located["compound_id"].fillna(findings["compound_id"])
    located = located.reindex(columns=list(FINDINGS.columns))
    return FINDINGS.validate(located.sort_values(["rule", "value_id"], kind="stable").reset_index(drop=True))


"""A plain hand-written Python twin of tools/bench/rulebook.yaml.

It reads a case with the engine's own reader (gasrules.evaluation.evaluator.read_case, so both sides see
the same canonical inputs), then does by hand what the engine does from the rulebook: derived
values, the 63 rules in order, the trace events, the finding texts, not_assessed, status and
headline. It must build exactly the result dict gasrules.interpret() builds for that rulebook,
trace included; tests/test_bench_twin.py checks this on thousands of generated cases, and
tools/bench_engine.py times the two side by side (the engine's overhead over plain Python).

Written the way a careful programmer would write one interpretation by hand: parameter values
as literals, one branch per rule, the trace event built only in the branch taken. Only the
provenance of each parameter (the file:line that set it, shown in the trace) is read from the
compiled rulebook, since it depends on where the file lives. If the rulebook changes, this file
must change with it (that is the point of a fixed benchmark).
"""

from __future__ import annotations

import math
import re
from collections.abc import Mapping
from typing import Any

from gasrules.evaluation.evaluator import read_case

_floor = math.floor
_log10 = math.log10
_pow = math.pow

FIRED, NOT_FIRED, SKIPPED, HALTED = 0, 1, 2, 3

# Parameters without `by`: name -> (value, unit). Hand-copied from the rulebook.
PARAMS: dict[str, tuple[Any, str]] = {
    "hh_pk": (6.1, "1"),
    "co2_solubility": (0.0307, "mmol/L/mm[Hg]"),
    "hco3_consistency_tolerance": (2.0, "mmol/L"),
    "ph_normal": (7.4, "[pH]"),
    "pco2_normal": (40.0, "mm[Hg]"),
    "hco3_normal": (24.0, "mmol/L"),
    "po2_low": (80.0, "mm[Hg]"),
    "critical_ph_low": (7.1, "[pH]"),
    "critical_ph_high": (7.6, "[pH]"),
    "critical_pco2_high": (70.0, "mm[Hg]"),
    "critical_po2_low": (60.0, "mm[Hg]"),
    "critical_k_low": (2.5, "mmol/L"),
    "critical_k_high": (6.5, "mmol/L"),
    "critical_lactate": (4.0, "mmol/L"),
    "adult_age_min": (18.0, "a"),
    "capillary_pco2_use": ("ventilation", ""),
    "winter_slope": (1.5, "mm[Hg]/(mmol/L)"),
    "winter_intercept": (8.0, "mm[Hg]"),
    "winter_tolerance": (2.0, "mm[Hg]"),
    "met_alk_slope": (0.7, "mm[Hg]/(mmol/L)"),
    "met_alk_tolerance": (2.0, "mm[Hg]"),
    "resp_acid_acute_slope": (0.1, "(mmol/L)/mm[Hg]"),
    "resp_acid_chronic_slope": (0.35, "(mmol/L)/mm[Hg]"),
    "resp_alk_acute_slope": (0.2, "(mmol/L)/mm[Hg]"),
    "resp_alk_chronic_slope": (0.4, "(mmol/L)/mm[Hg]"),
    "resp_hco3_tolerance": (2.0, "mmol/L"),
    "ag_normal": (10.0, "mmol/L"),
    "ag_high": (12.0, "mmol/L"),
    "ag_very_low": (2.0, "mmol/L"),
    "albumin_normal": (44.0, "g/L"),
    "figge_slope": (0.25, "(mmol/L)/(g/L)"),
    "delta_min_dhco3": (4.0, "mmol/L"),
    "delta_ratio_low": (0.4, "1"),
    "delta_ratio_pure_low": (0.8, "1"),
    "delta_ratio_high": (2.0, "1"),
    "pf_mild": (300.0, "mm[Hg]"),
    "pf_moderate": (200.0, "mm[Hg]"),
    "pf_severe": (100.0, "mm[Hg]"),
}
# Parameters chosen by sample_type: name -> (default, {code: value}, unit).
BY_SAMPLE: dict[str, tuple[float, dict[str, float], str]] = {
    "ph_low": (7.35, {"venous": 7.30, "mixed_venous": 7.30}, "[pH]"),
    "ph_high": (7.45, {"venous": 7.43, "mixed_venous": 7.43}, "[pH]"),
    "pco2_low": (35.0, {"venous": 38.0, "mixed_venous": 38.0}, "mm[Hg]"),
    "pco2_high": (45.0, {"venous": 58.0, "mixed_venous": 58.0}, "mm[Hg]"),
    "hco3_low": (22.0, {"venous": 22.0, "mixed_venous": 22.0}, "mmol/L"),
    "hco3_high": (26.0, {"venous": 30.0, "mixed_venous": 30.0}, "mmol/L"),
}

CAPILLARY_PCO2_USE = PARAMS["capillary_pco2_use"][0]

STEPS = (  # (label, core, rule indices) in the order the engine reports them
    ("Critical values", False, range(0, 7)),
    ("Intended use", False, range(7, 9)),
    ("Sample type", True, range(9, 12)),
    ("Sample consistency", True, range(12, 14)),
    ("pH state", True, range(14, 18)),
    ("Primary disorder(s)", True, range(18, 24)),
    ("Anion gap", True, (24, 25, 26, 48, 49, 50, 51)),
    ("Expected compensation", True, range(27, 48)),
    ("Delta analysis", True, range(52, 57)),
    ("Oxygenation", False, range(57, 62)),
    ("Notes", False, (62,)),
)
# Rules after the stop rule (index 12), for the halted events: (id, step, title).
AFTER_STOP = (
    ("consistency.passed", "consistency", "pH, PCO2 and HCO3 agree"),
    ("ph_state.acidaemia", "ph_state", "Acidaemia"),
    ("ph_state.alkalaemia", "ph_state", "Alkalaemia"),
    ("ph_state.normal", "ph_state", "pH within the reference interval"),
    ("ph_state.normal_with_abnormal_pair", "ph_state", "Normal pH with PCO2 and HCO3 both abnormal"),
    ("primary.metabolic_acidosis", "primary", "Primary metabolic acidosis"),
    ("primary.respiratory_acidosis", "primary", "Primary respiratory acidosis"),
    ("primary.metabolic_alkalosis", "primary", "Primary metabolic alkalosis"),
    ("primary.respiratory_alkalosis", "primary", "Primary respiratory alkalosis"),
    ("primary.two_primaries_same_direction", "primary", "Two primary disorders moving the pH the same way"),
    ("primary.unclassified", "primary", "Abnormal pH without a nameable primary"),
    ("anion_gap.albumin_corrected", "anion_gap", "Albumin-corrected anion gap"),
    ("anion_gap.albumin_missing", "anion_gap", "Albumin not given"),
    ("anion_gap.very_low", "anion_gap", "Very low anion gap"),
    (
        "compensation.metabolic_acidosis.appropriate",
        "compensation",
        "Respiratory response to metabolic acidosis as expected",
    ),
    ("compensation.metabolic_acidosis.pco2_high", "compensation", "PaCO2 above Winter's range"),
    ("compensation.metabolic_acidosis.pco2_low", "compensation", "PaCO2 below Winter's range"),
    (
        "compensation.metabolic_alkalosis.appropriate",
        "compensation",
        "Respiratory response to metabolic alkalosis as expected",
    ),
    (
        "compensation.metabolic_alkalosis.pco2_high",
        "compensation",
        "PaCO2 above the metabolic alkalosis range",
    ),
    (
        "compensation.metabolic_alkalosis.pco2_low",
        "compensation",
        "PaCO2 below the metabolic alkalosis range",
    ),
    (
        "compensation.metabolic_not_assessable",
        "compensation",
        "Respiratory response not assessable on this sample",
    ),
    ("compensation.respiratory_acidosis.acute_fits", "compensation", "HCO3 fits acute respiratory acidosis"),
    (
        "compensation.respiratory_acidosis.acute_hco3_high",
        "compensation",
        "HCO3 above the acute respiratory acidosis range",
    ),
    (
        "compensation.respiratory_acidosis.acute_hco3_low",
        "compensation",
        "HCO3 below the acute respiratory acidosis range",
    ),
    (
        "compensation.respiratory_acidosis.chronic_fits",
        "compensation",
        "HCO3 fits chronic respiratory acidosis",
    ),
    (
        "compensation.respiratory_acidosis.chronic_hco3_high",
        "compensation",
        "HCO3 above the chronic respiratory acidosis range",
    ),
    (
        "compensation.respiratory_acidosis.chronic_hco3_low",
        "compensation",
        "HCO3 below the chronic respiratory acidosis range",
    ),
    (
        "compensation.respiratory_acidosis.chronicity_unknown",
        "compensation",
        "Chronicity not stated: both expectations shown",
    ),
    (
        "compensation.respiratory_alkalosis.acute_fits",
        "compensation",
        "HCO3 fits acute respiratory alkalosis",
    ),
    (
        "compensation.respiratory_alkalosis.acute_hco3_high",
        "compensation",
        "HCO3 above the acute respiratory alkalosis range",
    ),
    (
        "compensation.respiratory_alkalosis.acute_hco3_low",
        "compensation",
        "HCO3 below the acute respiratory alkalosis range",
    ),
    (
        "compensation.respiratory_alkalosis.chronic_fits",
        "compensation",
        "HCO3 fits chronic respiratory alkalosis",
    ),
    (
        "compensation.respiratory_alkalosis.chronic_hco3_high",
        "compensation",
        "HCO3 above the chronic respiratory alkalosis range",
    ),
    (
        "compensation.respiratory_alkalosis.chronic_hco3_low",
        "compensation",
        "HCO3 below the chronic respiratory alkalosis range",
    ),
    (
        "compensation.respiratory_alkalosis.chronicity_unknown",
        "compensation",
        "Chronicity not stated: both expectations shown",
    ),
    ("anion_gap.high_gap_acidosis", "anion_gap", "High anion gap metabolic acidosis"),
    ("anion_gap.normal_gap_acidosis", "anion_gap", "Normal anion gap metabolic acidosis"),
    ("anion_gap.acidosis_type_unknown", "anion_gap", "Metabolic acidosis, anion gap not available"),
    ("anion_gap.hidden_high_gap", "anion_gap", "High anion gap without a low HCO3 reading"),
    ("delta.ratio_normal_gap_predominates", "delta", "Delta ratio low - normal-gap acidosis predominates"),
    ("delta.ratio_mixed_gap", "delta", "Delta ratio low - mixed high and normal gap acidosis"),
    ("delta.ratio_uncomplicated", "delta", "Delta ratio in the uncomplicated band"),
    ("delta.ratio_high", "delta", "Delta ratio high - metabolic alkalosis"),
    ("delta.ratio_not_computed", "delta", "Fall in HCO3 too small for a delta ratio"),
    ("oxygenation.not_arterial", "oxygenation", "Oxygenation not assessed on a non-arterial sample"),
    ("oxygenation.hypoxaemia", "oxygenation", "Arterial hypoxaemia"),
    ("oxygenation.pf_mild", "oxygenation", "P/F ratio in the mild band"),
    ("oxygenation.pf_moderate", "oxygenation", "P/F ratio in the moderate band"),
    ("oxygenation.pf_severe", "oxygenation", "P/F ratio in the severe band"),
    ("note.electrolytes_missing", "note", "Electrolytes not given"),
)

DISORDER_LABELS = {
    "respiratory_acidosis": "Respiratory acidosis",
    "respiratory_alkalosis": "Respiratory alkalosis",
    "metabolic_acidosis_high_anion_gap": "High anion gap metabolic acidosis",
    "metabolic_acidosis_normal_anion_gap": "Normal anion gap (hyperchloraemic) metabolic acidosis",
    "metabolic_acidosis": "Metabolic acidosis (anion gap not available)",
    "metabolic_alkalosis": "Metabolic alkalosis",
}
QUALIFIER_LABELS = {
    "acute": "acute",
    "chronic": "chronic",
    "between_acute_and_chronic": "between acute and chronic expectations",
}
NO_DISORDER = "No acid-base disorder identified from the values given"
ABNORMAL_UNEXPLAINED = "cause not identified from the values given"
INCONSISTENT = "Values inconsistent: not interpreted, please recheck"
REJECTED = "Input rejected: see errors"
CAUTIONS = (
    "Decision support only: this interpretation supports, and never replaces, the judgement of the clinician responsible for the patient.",
    "Local laboratory reference intervals, critical-value limits and clinical protocols take precedence over the defaults of this rulebook.",
    "Benchmark rulebook: a fixed subset kept for timing the engine; not for patient care.",
)
_WORD = re.compile(r"[a-z0-9]+")

PA = "primary.metabolic_acidosis"
PRA = "primary.respiratory_acidosis"
PMA = "primary.metabolic_alkalosis"
PRL = "primary.respiratory_alkalosis"
BELOW = "compensation.hco3_below_expected"


# ----------------------------------------------------------------------------- small helpers


def _rnd(x: float, scale: float) -> float:
    """Round half away from zero at 1/scale, tolerant of binary error (the engine's rule)."""
    if x >= 0:
        return _floor(x * scale + 0.5 + 1e-9) / scale + 0.0
    return -_floor(-x * scale + 0.5 + 1e-9) / scale + 0.0


def _cmp(
    quantity: str,
    value: Any,
    compared: Any,
    op: str,
    threshold: str,
    tvalue: Any,
    holds: bool | None,
    decisive: bool,
) -> dict[str, Any]:
    margin = None if compared is None or tvalue is None else round(compared - tvalue, 9)
    return {
        "quantity": quantity,
        "value": value,
        "compared": compared,
        "op": op,
        "threshold": threshold,
        "threshold_value": tvalue,
        "margin": margin,
        "holds": holds,
        "decisive": decisive,
    }


def _explain(cond: Any, outcome: bool) -> tuple[dict[int, bool], dict[int, bool]]:
    """Which numeric comparisons of a rule's condition were evaluated and what they gave (W), and
    whether forcing each one alone the other way changes the outcome (D). ``cond(q)`` is the
    condition written with each comparison k passed through ``q(k, value)``."""
    W: dict[int, bool] = {}

    def record(k: int, value: bool) -> bool:
        W[k] = bool(value)
        return value

    cond(record)
    D: dict[int, bool] = {}
    for k, held in W.items():

        def forced(j: int, value: bool, k: int = k, flipped: bool = not held) -> bool:
            return flipped if j == k else value

        try:
            D[k] = bool(cond(forced)) != outcome
        except (ArithmeticError, ValueError, TypeError):
            D[k] = False
    return W, D


def _t(v: Any, scale: float, fmt: str) -> str:
    """A value as the finding text shows it: at its precision with its unit label."""
    return "not available" if v is None else fmt % _rnd(v, scale)


def _ptext(value: float, label: str) -> str:
    """A parameter as text: as many decimals as its value has (at most 6)."""
    text = f"{value:.6f}".rstrip("0")
    prec = len(text.split(".")[1]) if "." in text else 0
    return f"{_rnd(value, 10.0**prec):.{prec}f}{label}"


def _unique(items: list[str]) -> list[str]:
    seen: set[str] = set()
    out = []
    for x in items:
        if x not in seen:
            seen.add(x)
            out.append(x)
    return out


def _headline(
    status: str,
    disorders: list[str],
    qualifiers: dict[str, str],
    headlines: list[tuple[int, str, str]],
    core_missing: list[str],
) -> str:
    if status == "inconsistent":
        critical = [h for s, c, h in headlines if s == 0 and c == "critical"]
        return "; ".join(_unique(critical + [INCONSISTENT]))
    critical = [h for s, c, h in headlines if s == 0]
    parts = []
    for code in disorders:
        text = DISORDER_LABELS[code]
        if code in qualifiers:
            text += f" ({QUALIFIER_LABELS[qualifiers[code]]})"
        parts.append(text)
    said = set(_WORD.findall(" ".join(parts + critical).lower()))
    state = [h for s, c, h in headlines if s == 1 and c == "ph_state"]
    others = [
        h for s, c, h in headlines if s == 1 and c != "ph_state" and not set(_WORD.findall(h.lower())) <= said
    ]
    if parts:
        main = " + ".join(parts)
    elif state:
        main = ABNORMAL_UNEXPLAINED + (
            " (not assessed: " + ", ".join(core_missing) + ")" if core_missing else ""
        )
    else:
        main = NO_DISORDER
    return "; ".join(_unique(critical + state + [main] + others))


# Texts of parameters without `by` (fixed) and labels of units.
_P = {
    n: (
        v.replace("_", " ")
        if isinstance(v, str)
        else _ptext(v, {"[pH]": "", "1": "", "mm[Hg]": " mmHg", "a": " years"}.get(u, " " + u))
    )
    for n, (v, u) in PARAMS.items()
}


class Twin:
    """Interprets cases for the benchmark rulebook, by hand. ``rb`` is the compiled benchmark
    rulebook: used for reading the case (read_case), its identity, and the file:line that set
    each parameter (trace provenance)."""

    def __init__(self, rb: Any):
        self.rb = rb
        self.identity = dict(rb.identity)
        self.engine_version = rb.engine_version
        self.pe = {
            n: {"value": v, "unit": u, "set_by": str(rb.parameters[n].set_by)} for n, (v, u) in PARAMS.items()
        }
        self.by_set_by = {
            n: (
                {code: str(rb.parameters[n].set_by_for(code)) for code in BY_SAMPLE[n][1]},
                str(rb.parameters[n].set_by),
            )
            for n in BY_SAMPLE
        }

    def interpret(self, case: Any, trace: bool = True) -> dict[str, Any]:
        inputs, errors, case_id, context = read_case(self.rb, case)
        result: dict[str, Any] = {
            "schema_version": "1.1",
            "case_id": case_id if isinstance(case_id, str) else None,
            "context": dict(context) if isinstance(context, Mapping) else {},
            "rulebook": dict(self.identity),
            "engine_version": self.engine_version,
        }
        if errors:
            # Critical-value rules still run on the fields that were read.
            full = _evaluate(self, inputs, dict(result), [] if trace else None)
            always = {r.id for r in self.rb.rules if r.always}
            heads = {
                (r.id, f.code): f.headline
                for r in self.rb.rules
                if r.always
                for f in r.findings
                if f.headline and f.severity == "critical"
            }
            findings = [f for f in full["findings"] if f["rule"] in always]
            phrases = [heads[(f["rule"], f["code"])] for f in findings if (f["rule"], f["code"]) in heads]
            fields = [e["field"] for e in errors if e["field"]]
            headline = "; ".join(
                _unique(phrases + [REJECTED + (" (" + ", ".join(_unique(fields)) + ")" if fields else "")])
            )
            result.update(
                status="rejected",
                headline=headline,
                errors=errors,
                inputs={},
                values={},
                units={},
                findings=findings,
                disorders=[],
                qualifiers={},
                not_assessed=[
                    {
                        "what": "interpretation",
                        "why": "input rejected: " + "; ".join(e["message"] for e in errors),
                    }
                ],
                cautions=list(CAUTIONS),
                trace=[e for e in full["trace"] if e["rule"] in always],
                calculated=[],
            )
            return result
        T: list[Any] | None = [] if trace else None
        return _evaluate(self, inputs, result, T)


def _evaluate(tw: Twin, I: dict[str, Any], result: dict[str, Any], T: list[Any] | None) -> dict[str, Any]:
    PE = tw.pe
    ph, pco2, po2, hco3 = I["ph"], I["pco2"], I["po2"], I["hco3"]
    na, cl, k, albumin, lactate = I["na"], I["cl"], I["k"], I["albumin"], I["lactate"]
    age, fio2, so2 = I["age"], I["fio2"], I["so2"]
    st, chronicity, pregnant = I["sample_type"], I["chronicity"], I["pregnant"]
    r_ph = None if ph is None else _rnd(ph, 100.0)
    r_pco2 = None if pco2 is None else _rnd(pco2, 10.0)
    r_po2 = None if po2 is None else _rnd(po2, 10.0)
    r_hco3 = None if hco3 is None else _rnd(hco3, 10.0)
    r_k = None if k is None else _rnd(k, 10.0)
    r_lactate = None if lactate is None else _rnd(lactate, 10.0)
    r_age = None if age is None else _rnd(age, 10.0)
    venous = st == "venous" or st == "mixed_venous"
    ph_low, ph_high = (7.3, 7.43) if venous else (7.35, 7.45)
    pco2_low, pco2_high = (38.0, 58.0) if venous else (35.0, 45.0)
    hco3_low, hco3_high = 22.0, (30.0 if venous else 26.0)
    F: set[str] = set()
    O: list[int] = []
    missing_of: dict[int, list[str]] = {}
    findings: list[dict[str, Any]] = []
    disorders: list[str] = []
    qualifiers: dict[str, str] = {}
    heads: list[tuple[int, str, str]] = []
    cautions: list[str] = []
    if T is not None:
        sel = "sample_type=" + str(st)
        sb = tw.by_set_by
        b_ph_low = {
            "value": ph_low,
            "unit": "[pH]",
            "set_by": sb["ph_low"][0].get(st, sb["ph_low"][1]),
            "selected_by": sel,
        }
        b_ph_high = {
            "value": ph_high,
            "unit": "[pH]",
            "set_by": sb["ph_high"][0].get(st, sb["ph_high"][1]),
            "selected_by": sel,
        }
        b_pco2_low = {
            "value": pco2_low,
            "unit": "mm[Hg]",
            "set_by": sb["pco2_low"][0].get(st, sb["pco2_low"][1]),
            "selected_by": sel,
        }
        b_pco2_high = {
            "value": pco2_high,
            "unit": "mm[Hg]",
            "set_by": sb["pco2_high"][0].get(st, sb["pco2_high"][1]),
            "selected_by": sel,
        }
        b_hco3_low = {
            "value": hco3_low,
            "unit": "mmol/L",
            "set_by": sb["hco3_low"][0].get(st, sb["hco3_low"][1]),
            "selected_by": sel,
        }
        b_hco3_high = {
            "value": hco3_high,
            "unit": "mmol/L",
            "set_by": sb["hco3_high"][0].get(st, sb["hco3_high"][1]),
            "selected_by": sel,
        }

    def finding(code: str, category: str, severity: str, text: str, rule: str) -> None:
        findings.append(
            {"code": code, "category": category, "severity": severity, "text": text, "rule": rule}
        )

    def event(
        rule: str,
        step: str,
        title: str,
        c: bool,
        reads: dict[str, Any],
        params: dict[str, Any] | None,
        comps: list[Any] | None,
        asserted: list[str],
    ) -> None:
        ev: dict[str, Any] = {
            "rule": rule,
            "step": step,
            "title": title,
            "outcome": "fired" if c else "not_fired",
            "reads": reads,
        }
        if params is not None:
            ev["parameters"] = params
        if comps is not None:
            ev["comparisons"] = comps
        if c:
            ev["asserted"] = asserted
        T.append(ev)  # type: ignore[union-attr]

    def skipped(
        i: int,
        rule: str,
        step: str,
        title: str,
        reads: dict[str, Any],
        params: dict[str, Any] | None,
        missing: list[str],
    ) -> None:
        O.append(SKIPPED)
        missing_of[i] = missing
        if T is not None:
            ev: dict[str, Any] = {
                "rule": rule,
                "step": step,
                "title": title,
                "outcome": "skipped_missing_input",
                "reads": reads,
            }
            if params is not None:
                ev["parameters"] = params
            ev["missing"] = missing
            T.append(ev)

    t_ph = _t(ph, 100.0, "%.2f")
    t_pco2 = _t(pco2, 10.0, "%.1f mmHg")
    t_hco3 = _t(hco3, 10.0, "%.1f mmol/L")

    # --------------------------------------------------------------- critical values (always)
    c = ph is not None and r_ph < 7.1
    O.append(FIRED if c else NOT_FIRED)
    if c:
        F.add("critical.ph_low")
        finding(
            "critical.ph_low",
            "critical",
            "critical",
            f"CRITICAL: pH {t_ph} is below the critical limit {_P['critical_ph_low']}. Notify according to local policy.",
            "critical.ph_low",
        )
        heads.append((0, "critical", "Critical pH"))
    if T is not None:
        W, D = _explain(lambda q: ph is not None and q(0, r_ph < 7.1), c)
        event(
            "critical.ph_low",
            "critical",
            "Critically low pH",
            c,
            {"ph": ph},
            {"critical_ph_low": PE["critical_ph_low"]},
            [_cmp("ph", ph, r_ph, "<", "critical_ph_low", 7.1, W.get(0), D.get(0, False))],
            ["critical.ph_low"],
        )
    c = ph is not None and r_ph > 7.6
    O.append(FIRED if c else NOT_FIRED)
    if c:
        F.add("critical.ph_high")
        finding(
            "critical.ph_high",
            "critical",
            "critical",
            f"CRITICAL: pH {t_ph} is above the critical limit {_P['critical_ph_high']}. Notify according to local policy.",
            "critical.ph_high",
        )
        heads.append((0, "critical", "Critical pH"))
    if T is not None:
        W, D = _explain(lambda q: ph is not None and q(0, r_ph > 7.6), c)
        event(
            "critical.ph_high",
            "critical",
            "Critically high pH",
            c,
            {"ph": ph},
            {"critical_ph_high": PE["critical_ph_high"]},
            [_cmp("ph", ph, r_ph, ">", "critical_ph_high", 7.6, W.get(0), D.get(0, False))],
            ["critical.ph_high"],
        )
    c = pco2 is not None and r_pco2 > 70.0
    O.append(FIRED if c else NOT_FIRED)
    if c:
        F.add("critical.pco2_high")
        finding(
            "critical.pco2_high",
            "critical",
            "critical",
            f"CRITICAL: PCO2 {t_pco2} is above the critical limit {_P['critical_pco2_high']}.",
            "critical.pco2_high",
        )
        heads.append((0, "critical", "Critical PCO2"))
    if T is not None:
        W, D = _explain(lambda q: pco2 is not None and q(0, r_pco2 > 70.0), c)
        event(
            "critical.pco2_high",
            "critical",
            "Critically high PCO2",
            c,
            {"pco2": pco2},
            {"critical_pco2_high": PE["critical_pco2_high"]},
            [_cmp("pco2", pco2, r_pco2, ">", "critical_pco2_high", 70.0, W.get(0), D.get(0, False))],
            ["critical.pco2_high"],
        )
    c = po2 is not None and r_po2 < 60.0 and st == "arterial"
    O.append(FIRED if c else NOT_FIRED)
    if c:
        F.add("critical.po2_low")
        finding(
            "critical.po2_low",
            "critical",
            "critical",
            f"CRITICAL: arterial PO2 {_t(po2, 10.0, '%.1f mmHg')} is below the critical limit {_P['critical_po2_low']}.",
            "critical.po2_low",
        )
        heads.append((0, "critical", "Critical PO2"))
    if T is not None:
        W, D = _explain(lambda q: po2 is not None and q(0, r_po2 < 60.0) and st == "arterial", c)
        event(
            "critical.po2_low",
            "critical",
            "Critically low PO2 (arterial sample)",
            c,
            {"po2": po2, "sample_type": st},
            {"critical_po2_low": PE["critical_po2_low"]},
            [_cmp("po2", po2, r_po2, "<", "critical_po2_low", 60.0, W.get(0), D.get(0, False))],
            ["critical.po2_low"],
        )
    c = k is not None and r_k < 2.5
    O.append(FIRED if c else NOT_FIRED)
    if c:
        F.add("critical.k_low")
        finding(
            "critical.k_low",
            "critical",
            "critical",
            f"CRITICAL: potassium {_t(k, 10.0, '%.1f mmol/L')} is below the critical limit {_P['critical_k_low']}.",
            "critical.k_low",
        )
        heads.append((0, "critical", "Critical potassium"))
    if T is not None:
        W, D = _explain(lambda q: k is not None and q(0, r_k < 2.5), c)
        event(
            "critical.k_low",
            "critical",
            "Critically low potassium",
            c,
            {"k": k},
            {"critical_k_low": PE["critical_k_low"]},
            [_cmp("k", k, r_k, "<", "critical_k_low", 2.5, W.get(0), D.get(0, False))],
            ["critical.k_low"],
        )
    c = k is not None and r_k > 6.5
    O.append(FIRED if c else NOT_FIRED)
    if c:
        F.add("critical.k_high")
        finding(
            "critical.k_high",
            "critical",
            "critical",
            f"CRITICAL: potassium {_t(k, 10.0, '%.1f mmol/L')} is above the critical limit {_P['critical_k_high']} (exclude haemolysis).",
            "critical.k_high",
        )
        heads.append((0, "critical", "Critical potassium"))
    if T is not None:
        W, D = _explain(lambda q: k is not None and q(0, r_k > 6.5), c)
        event(
            "critical.k_high",
            "critical",
            "Critically high potassium",
            c,
            {"k": k},
            {"critical_k_high": PE["critical_k_high"]},
            [_cmp("k", k, r_k, ">", "critical_k_high", 6.5, W.get(0), D.get(0, False))],
            ["critical.k_high"],
        )
    c = lactate is not None and r_lactate >= 4.0
    O.append(FIRED if c else NOT_FIRED)
    if c:
        F.add("critical.lactate_high")
        finding(
            "critical.lactate_high",
            "critical",
            "critical",
            f"CRITICAL: lactate {_t(lactate, 10.0, '%.1f mmol/L')} is at or above {_P['critical_lactate']}.",
            "critical.lactate_high",
        )
        heads.append((0, "critical", "Critical lactate"))
    if T is not None:
        W, D = _explain(lambda q: lactate is not None and q(0, r_lactate >= 4.0), c)
        event(
            "critical.lactate_high",
            "critical",
            "Markedly raised lactate",
            c,
            {"lactate": lactate},
            {"critical_lactate": PE["critical_lactate"]},
            [_cmp("lactate", lactate, r_lactate, ">=", "critical_lactate", 4.0, W.get(0), D.get(0, False))],
            ["critical.lactate_high"],
        )

    # --------------------------------------------------------------- scope
    c = age is not None and r_age < 18.0
    O.append(FIRED if c else NOT_FIRED)
    if c:
        F.add("scope.paediatric")
        text = (
            f"Age {_t(age, 10.0, '%.1f years')} is below {_P['adult_age_min']}: "
            "the adult intervals and compensation rules may not apply."
        )
        finding("scope.paediatric", "scope", "warning", text, "scope.paediatric")
        cautions.append(text)
    if T is not None:
        W, D = _explain(lambda q: age is not None and q(0, r_age < 18.0), c)
        event(
            "scope.paediatric",
            "scope",
            "Patient younger than the adult range",
            c,
            {"age": age},
            {"adult_age_min": PE["adult_age_min"]},
            [_cmp("age", age, r_age, "<", "adult_age_min", 18.0, W.get(0), D.get(0, False))],
            ["scope.paediatric"],
        )
    if pregnant is None:
        skipped(8, "scope.pregnancy", "scope", "Pregnancy", {"pregnant": pregnant}, None, ["pregnant"])
    else:
        c = bool(pregnant)
        O.append(FIRED if c else NOT_FIRED)
        if c:
            F.add("scope.pregnancy")
            text = (
                "Pregnant patient: normal PaCO2 and HCO3 are lower in pregnancy; "
                "interpret with pregnancy-specific ranges."
            )
            finding("scope.pregnancy", "scope", "warning", text, "scope.pregnancy")
            cautions.append(text)
        if T is not None:
            event(
                "scope.pregnancy",
                "scope",
                "Pregnancy",
                c,
                {"pregnant": pregnant},
                None,
                None,
                ["scope.pregnancy"],
            )

    # --------------------------------------------------------------- sample type
    for i, (rule, title, c, text) in enumerate(
        (
            (
                "sample.venous",
                "Venous or mixed venous sample",
                venous,
                "Venous sample: pH and HCO3 are read against venous intervals; the venous PCO2 does not "
                "assess ventilation and oxygenation is not assessed.",
            ),
            (
                "sample.capillary",
                "Capillary sample",
                st == "capillary",
                f"Capillary sample: PCO2 judges ventilation only if arterialised (setting: {_P['capillary_pco2_use']}); "
                "oxygenation is not assessed.",
            ),
            (
                "sample.unknown",
                "Sample type not given",
                st == "unknown",
                "Sample type not given: values are read against arterial intervals; oxygenation is not assessed.",
            ),
        )
    ):
        if st is None:
            skipped(9 + i, rule, "sample", title, {"sample_type": st}, None, ["sample_type"])
            continue
        O.append(FIRED if c else NOT_FIRED)
        if c:
            F.add(rule)
            finding(rule, "sample", "info", text, rule)
            if i == 0:
                heads.append((1, "sample", "Venous sample"))
        if T is not None:
            event(rule, "sample", title, c, {"sample_type": st}, None, None, [rule])

    # --------------------------------------------------------------- consistency
    calculated_hco3 = None if ph is None or pco2 is None else float(0.0307 * pco2 * _pow(10.0, ph - 6.1))
    hco3_discrepancy = None if hco3 is None or calculated_hco3 is None else float(abs(hco3 - calculated_hco3))
    r_disc = None if hco3_discrepancy is None else _rnd(hco3_discrepancy, 100.0)
    calculated_ph = None if hco3 is None or pco2 is None else float(6.1 + _log10(hco3 / (0.0307 * pco2)))
    p_tol = PE["hco3_consistency_tolerance"] if T is not None else None
    halted = False
    if hco3_discrepancy is None:
        skipped(
            12,
            "consistency.hh_ph",
            "consistency",
            "Henderson-Hasselbalch consistency",
            {"hco3_discrepancy": None},
            {"hco3_consistency_tolerance": p_tol},
            ["hco3_discrepancy"],
        )
    else:
        c = r_disc > 2.0
        O.append(FIRED if c else NOT_FIRED)
        if c:
            halted = True
            F.add("consistency.hh_ph")
            finding(
                "consistency.hh_ph",
                "consistency",
                "critical",
                f"Values do not fit together: HCO3 {t_hco3} differs from HCO3 recalculated from pH {t_ph} and "
                f"PCO2 {t_pco2} ({_t(calculated_hco3, 100.0, '%.2f mmol/L')}) by "
                f"{_t(hco3_discrepancy, 100.0, '%.2f mmol/L')}, more than {_P['hco3_consistency_tolerance']}. "
                "No disorder is named; please recheck the values.",
                "consistency.hh_ph",
            )
            heads.append((0, "consistency", "Inconsistent values"))
        if T is not None:
            W, D = _explain(lambda q: q(0, r_disc > 2.0), c)
            event(
                "consistency.hh_ph",
                "consistency",
                "Henderson-Hasselbalch consistency",
                c,
                {"hco3_discrepancy": hco3_discrepancy},
                {"hco3_consistency_tolerance": p_tol},
                [
                    _cmp(
                        "hco3_discrepancy",
                        hco3_discrepancy,
                        r_disc,
                        ">",
                        "hco3_consistency_tolerance",
                        2.0,
                        W.get(0),
                        D.get(0, False),
                    )
                ],
                ["consistency.hh_ph"],
            )
    # values every path reports (computed whatever the rules conclude)
    pco2_vent = None
    if (
        pco2 is not None
        and st is not None
        and (
            st == "arterial" or st == "unknown" or (st == "capillary" and CAPILLARY_PCO2_USE == "ventilation")
        )
    ):
        pco2_vent = float(pco2)
    anion_gap = None if na is None or cl is None or hco3 is None else float(na - (cl + hco3))
    agc = None if anion_gap is None or albumin is None else float(anion_gap + 0.25 * (44.0 - albumin))
    ag_used = None if anion_gap is None else float(agc if agc is not None else anion_gap)
    pf_ratio = None
    if po2 is not None and fio2 is not None and st is not None and st == "arterial":
        pf_ratio = float(po2 / fio2)
    vals = {
        "calculated_ph": calculated_ph,
        "calculated_hco3": calculated_hco3,
        "hco3_discrepancy": hco3_discrepancy,
        "anion_gap": anion_gap,
        "anion_gap_albumin_corrected": agc,
        "ag_used": ag_used,
        "pf_ratio": pf_ratio,
        "delta_ag": None,
        "delta_hco3": None,
        "delta_ratio": None,
        "delta_gap": None,
        "expected_pco2": None,
        "expected_pco2_low": None,
        "expected_pco2_high": None,
        "expected_hco3_acute": None,
        "expected_hco3_chronic": None,
    }
    if halted:
        O.extend([HALTED] * len(AFTER_STOP))
        if T is not None:
            T.extend([{"rule": r, "step": s, "title": t, "outcome": "halted"} for r, s, t in AFTER_STOP])
        return _assemble(
            tw,
            result,
            I,
            vals,
            O,
            missing_of,
            findings,
            disorders,
            qualifiers,
            heads,
            cautions,
            "inconsistent",
            T,
        )
    if hco3_discrepancy is None:
        skipped(
            13,
            "consistency.passed",
            "consistency",
            "pH, PCO2 and HCO3 agree",
            {"hco3_discrepancy": None},
            {"hco3_consistency_tolerance": p_tol},
            ["hco3_discrepancy"],
        )
    else:
        c = r_disc <= 2.0
        O.append(FIRED if c else NOT_FIRED)
        if c:
            F.add("consistency.passed")
            finding(
                "consistency.passed",
                "consistency",
                "info",
                f"pH, PCO2 and HCO3 agree: Henderson-Hasselbalch pH {_t(calculated_ph, 1000.0, '%.3f')}, "
                f"recalculated HCO3 {_t(calculated_hco3, 100.0, '%.2f mmol/L')}.",
                "consistency.passed",
            )
        if T is not None:
            W, D = _explain(lambda q: q(0, r_disc <= 2.0), c)
            event(
                "consistency.passed",
                "consistency",
                "pH, PCO2 and HCO3 agree",
                c,
                {"hco3_discrepancy": hco3_discrepancy},
                {"hco3_consistency_tolerance": p_tol},
                [
                    _cmp(
                        "hco3_discrepancy",
                        hco3_discrepancy,
                        r_disc,
                        "<=",
                        "hco3_consistency_tolerance",
                        2.0,
                        W.get(0),
                        D.get(0, False),
                    )
                ],
                ["consistency.passed"],
            )

    # --------------------------------------------------------------- pH state
    t_ph_low, t_ph_high = _ptext(ph_low, ""), _ptext(ph_high, "")
    if ph is None:
        for i, (rule, title) in enumerate(
            (
                ("ph_state.acidaemia", "Acidaemia"),
                ("ph_state.alkalaemia", "Alkalaemia"),
                ("ph_state.normal", "pH within the reference interval"),
            )
        ):
            params = (
                None
                if T is None
                else (
                    {"ph_low": b_ph_low}
                    if i == 0
                    else {"ph_high": b_ph_high}
                    if i == 1
                    else {"ph_high": b_ph_high, "ph_low": b_ph_low}
                )
            )
            skipped(14 + i, rule, "ph_state", title, {"ph": None}, params, ["ph"])
    else:
        c = r_ph < ph_low
        O.append(FIRED if c else NOT_FIRED)
        if c:
            F.add("ph_state.acidaemia")
            finding(
                "ph_state.acidaemia",
                "ph_state",
                "warning",
                f"pH {t_ph} is below {t_ph_low}: acidaemia.",
                "ph_state.acidaemia",
            )
            heads.append((1, "ph_state", "Acidaemia"))
        if T is not None:
            W, D = _explain(lambda q: q(0, r_ph < ph_low), c)
            event(
                "ph_state.acidaemia",
                "ph_state",
                "Acidaemia",
                c,
                {"ph": ph},
                {"ph_low": b_ph_low},
                [_cmp("ph", ph, r_ph, "<", "ph_low", ph_low, W.get(0), D.get(0, False))],
                ["ph_state.acidaemia"],
            )
        c = r_ph > ph_high
        O.append(FIRED if c else NOT_FIRED)
        if c:
            F.add("ph_state.alkalaemia")
            finding(
                "ph_state.alkalaemia",
                "ph_state",
                "warning",
                f"pH {t_ph} is above {t_ph_high}: alkalaemia.",
                "ph_state.alkalaemia",
            )
            heads.append((1, "ph_state", "Alkalaemia"))
        if T is not None:
            W, D = _explain(lambda q: q(0, r_ph > ph_high), c)
            event(
                "ph_state.alkalaemia",
                "ph_state",
                "Alkalaemia",
                c,
                {"ph": ph},
                {"ph_high": b_ph_high},
                [_cmp("ph", ph, r_ph, ">", "ph_high", ph_high, W.get(0), D.get(0, False))],
                ["ph_state.alkalaemia"],
            )
        c = ph_low <= r_ph <= ph_high
        O.append(FIRED if c else NOT_FIRED)
        if c:
            F.add("ph_state.normal")
            finding(
                "ph_state.normal",
                "ph_state",
                "info",
                f"pH {t_ph} is within {t_ph_low}-{t_ph_high}. A normal pH does not exclude an acid-base disorder.",
                "ph_state.normal",
            )
        if T is not None:
            W, D = _explain(lambda q: q(0, ph_low <= r_ph <= ph_high), c)
            event(
                "ph_state.normal",
                "ph_state",
                "pH within the reference interval",
                c,
                {"ph": ph},
                {"ph_high": b_ph_high, "ph_low": b_ph_low},
                [
                    _cmp("ph", ph, r_ph, ">=", "ph_low", ph_low, W.get(0), D.get(0, False)),
                    _cmp("ph", ph, r_ph, "<=", "ph_high", ph_high, W.get(0), D.get(0, False)),
                ],
                ["ph_state.normal"],
            )
    params = (
        None
        if T is None
        else {
            "ph_low": b_ph_low,
            "ph_high": b_ph_high,
            "pco2_high": b_pco2_high,
            "hco3_high": b_hco3_high,
            "pco2_low": b_pco2_low,
            "hco3_low": b_hco3_low,
        }
    )
    if ph is None or pco2 is None or hco3 is None:
        skipped(
            17,
            "ph_state.normal_with_abnormal_pair",
            "ph_state",
            "Normal pH with PCO2 and HCO3 both abnormal",
            {"hco3": hco3, "pco2": pco2, "ph": ph},
            params,
            [n for n, v in (("hco3", hco3), ("pco2", pco2), ("ph", ph)) if v is None],
        )
    else:
        c = ph_low <= r_ph <= ph_high and (
            (r_pco2 > pco2_high and r_hco3 > hco3_high) or (r_pco2 < pco2_low and r_hco3 < hco3_low)
        )
        O.append(FIRED if c else NOT_FIRED)
        if c:
            F.add("ph_state.normal_with_abnormal_pair")
            finding(
                "ph_state.normal_with_abnormal_pair",
                "ph_state",
                "warning",
                f"pH is normal while PCO2 ({t_pco2}) and HCO3 ({t_hco3}) are both abnormal: "
                "a mixed disorder is likely.",
                "ph_state.normal_with_abnormal_pair",
            )
        if T is not None:
            W, D = _explain(
                lambda q: (
                    q(0, ph_low <= r_ph <= ph_high)
                    and (
                        (q(1, r_pco2 > pco2_high) and q(2, r_hco3 > hco3_high))
                        or (q(3, r_pco2 < pco2_low) and q(4, r_hco3 < hco3_low))
                    )
                ),
                c,
            )
            event(
                "ph_state.normal_with_abnormal_pair",
                "ph_state",
                "Normal pH with PCO2 and HCO3 both abnormal",
                c,
                {"hco3": hco3, "pco2": pco2, "ph": ph},
                params,
                [
                    _cmp("ph", ph, r_ph, ">=", "ph_low", ph_low, W.get(0), D.get(0, False)),
                    _cmp("ph", ph, r_ph, "<=", "ph_high", ph_high, W.get(0), D.get(0, False)),
                    _cmp("pco2", pco2, r_pco2, ">", "pco2_high", pco2_high, W.get(1), D.get(1, False)),
                    _cmp("hco3", hco3, r_hco3, ">", "hco3_high", hco3_high, W.get(2), D.get(2, False)),
                    _cmp("pco2", pco2, r_pco2, "<", "pco2_low", pco2_low, W.get(3), D.get(3, False)),
                    _cmp("hco3", hco3, r_hco3, "<", "hco3_low", hco3_low, W.get(4), D.get(4, False)),
                ],
                ["ph_state.normal_with_abnormal_pair"],
            )

    # --------------------------------------------------------------- primary disorders
    t_ph_normal = _P["ph_normal"]
    r_pv = None if pco2_vent is None else _rnd(pco2_vent, 10.0)
    # metabolic acidosis
    params = (
        None if T is None else {"hco3_low": b_hco3_low, "pco2_low": b_pco2_low, "ph_normal": PE["ph_normal"]}
    )
    reads = {"hco3": hco3, "pco2": pco2, "ph": ph}
    if hco3 is None or ph is None:
        skipped(
            18,
            PA,
            "primary",
            "Primary metabolic acidosis",
            reads,
            params,
            [n for n, v in (("hco3", hco3), ("ph", ph)) if v is None],
        )
    else:
        c = r_hco3 < hco3_low and not (pco2 is not None and r_pco2 < pco2_low and r_ph > 7.4)
        O.append(FIRED if c else NOT_FIRED)
        if c:
            F.add(PA)
            finding(
                PA,
                "primary",
                "warning",
                f"HCO3 {t_hco3} is below {_ptext(hco3_low, ' mmol/L')} with the pH {t_ph} not on the alkaline "
                f"side of {t_ph_normal}: a primary metabolic acidosis.",
                PA,
            )
            heads.append((1, "primary", "Metabolic acidosis"))
        if T is not None:
            W, D = _explain(
                lambda q: (
                    q(0, r_hco3 < hco3_low)
                    and not (pco2 is not None and q(1, r_pco2 < pco2_low) and q(2, r_ph > 7.4))
                ),
                c,
            )
            event(
                PA,
                "primary",
                "Primary metabolic acidosis",
                c,
                reads,
                params,
                [
                    _cmp("hco3", hco3, r_hco3, "<", "hco3_low", hco3_low, W.get(0), D.get(0, False)),
                    _cmp("pco2", pco2, r_pco2, "<", "pco2_low", pco2_low, W.get(1), D.get(1, False)),
                    _cmp("ph", ph, r_ph, ">", "ph_normal", 7.4, W.get(2), D.get(2, False)),
                ],
                [PA],
            )
    # respiratory acidosis
    params = (
        None
        if T is None
        else {"hco3_high": b_hco3_high, "pco2_high": b_pco2_high, "ph_normal": PE["ph_normal"]}
    )
    reads = {"hco3": hco3, "pco2_vent": pco2_vent, "ph": ph}
    if hco3 is None or pco2_vent is None or ph is None:
        skipped(
            19,
            PRA,
            "primary",
            "Primary respiratory acidosis",
            reads,
            params,
            [n for n, v in (("hco3", hco3), ("pco2_vent", pco2_vent), ("ph", ph)) if v is None],
        )
    else:
        c = r_pv > pco2_high and not (r_hco3 > hco3_high and r_ph > 7.4)
        O.append(FIRED if c else NOT_FIRED)
        if c:
            F.add(PRA)
            F.add("respiratory_acidosis")
            disorders.append("respiratory_acidosis")
            finding(
                PRA,
                "primary",
                "warning",
                f"PCO2 {t_pco2} is above {_ptext(pco2_high, ' mmHg')} with the pH {t_ph} not on the alkaline "
                f"side of {t_ph_normal}: a primary respiratory acidosis.",
                PRA,
            )
            heads.append((1, "primary", "Respiratory acidosis"))
        if T is not None:
            W, D = _explain(
                lambda q: q(0, r_pv > pco2_high) and not (q(1, r_hco3 > hco3_high) and q(2, r_ph > 7.4)), c
            )
            event(
                PRA,
                "primary",
                "Primary respiratory acidosis",
                c,
                reads,
                params,
                [
                    _cmp(
                        "pco2_vent", pco2_vent, r_pv, ">", "pco2_high", pco2_high, W.get(0), D.get(0, False)
                    ),
                    _cmp("hco3", hco3, r_hco3, ">", "hco3_high", hco3_high, W.get(1), D.get(1, False)),
                    _cmp("ph", ph, r_ph, ">", "ph_normal", 7.4, W.get(2), D.get(2, False)),
                ],
                [PRA, "respiratory_acidosis"],
            )
    # metabolic alkalosis
    params = (
        None
        if T is None
        else {"hco3_high": b_hco3_high, "pco2_high": b_pco2_high, "ph_normal": PE["ph_normal"]}
    )
    reads = {"hco3": hco3, "pco2": pco2, "ph": ph}
    if hco3 is None or ph is None:
        skipped(
            20,
            PMA,
            "primary",
            "Primary metabolic alkalosis",
            reads,
            params,
            [n for n, v in (("hco3", hco3), ("ph", ph)) if v is None],
        )
    else:
        c = r_hco3 > hco3_high and not (pco2 is not None and r_pco2 > pco2_high and r_ph < 7.4)
        O.append(FIRED if c else NOT_FIRED)
        if c:
            F.add(PMA)
            F.add("metabolic_alkalosis")
            if "metabolic_alkalosis" not in disorders:
                disorders.append("metabolic_alkalosis")
            finding(
                PMA,
                "primary",
                "warning",
                f"HCO3 {t_hco3} is above {_ptext(hco3_high, ' mmol/L')} with the pH {t_ph} not on the acid "
                f"side of {t_ph_normal}: a primary metabolic alkalosis.",
                PMA,
            )
            heads.append((1, "primary", "Metabolic alkalosis"))
        if T is not None:
            W, D = _explain(
                lambda q: (
                    q(0, r_hco3 > hco3_high)
                    and not (pco2 is not None and q(1, r_pco2 > pco2_high) and q(2, r_ph < 7.4))
                ),
                c,
            )
            event(
                PMA,
                "primary",
                "Primary metabolic alkalosis",
                c,
                reads,
                params,
                [
                    _cmp("hco3", hco3, r_hco3, ">", "hco3_high", hco3_high, W.get(0), D.get(0, False)),
                    _cmp("pco2", pco2, r_pco2, ">", "pco2_high", pco2_high, W.get(1), D.get(1, False)),
                    _cmp("ph", ph, r_ph, "<", "ph_normal", 7.4, W.get(2), D.get(2, False)),
                ],
                ["metabolic_alkalosis", PMA],
            )
    # respiratory alkalosis
    params = (
        None if T is None else {"hco3_low": b_hco3_low, "pco2_low": b_pco2_low, "ph_normal": PE["ph_normal"]}
    )
    reads = {"hco3": hco3, "pco2_vent": pco2_vent, "ph": ph}
    if hco3 is None or pco2_vent is None or ph is None:
        skipped(
            21,
            PRL,
            "primary",
            "Primary respiratory alkalosis",
            reads,
            params,
            [n for n, v in (("hco3", hco3), ("pco2_vent", pco2_vent), ("ph", ph)) if v is None],
        )
    else:
        c = r_pv < pco2_low and not (r_hco3 < hco3_low and r_ph < 7.4)
        O.append(FIRED if c else NOT_FIRED)
        if c:
            F.add(PRL)
            F.add("respiratory_alkalosis")
            if "respiratory_alkalosis" not in disorders:
                disorders.append("respiratory_alkalosis")
            finding(
                PRL,
                "primary",
                "warning",
                f"PCO2 {t_pco2} is below {_ptext(pco2_low, ' mmHg')} with the pH {t_ph} not on the acid "
                f"side of {t_ph_normal}: a primary respiratory alkalosis.",
                PRL,
            )
            heads.append((1, "primary", "Respiratory alkalosis"))
        if T is not None:
            W, D = _explain(
                lambda q: q(0, r_pv < pco2_low) and not (q(1, r_hco3 < hco3_low) and q(2, r_ph < 7.4)), c
            )
            event(
                PRL,
                "primary",
                "Primary respiratory alkalosis",
                c,
                reads,
                params,
                [
                    _cmp("pco2_vent", pco2_vent, r_pv, "<", "pco2_low", pco2_low, W.get(0), D.get(0, False)),
                    _cmp("hco3", hco3, r_hco3, "<", "hco3_low", hco3_low, W.get(1), D.get(1, False)),
                    _cmp("ph", ph, r_ph, "<", "ph_normal", 7.4, W.get(2), D.get(2, False)),
                ],
                [PRL, "respiratory_alkalosis"],
            )
    # two primaries
    rule = "primary.two_primaries_same_direction"
    title = "Two primary disorders moving the pH the same way"
    params = (
        None
        if T is None
        else {
            "hco3_low": b_hco3_low,
            "pco2_high": b_pco2_high,
            "hco3_high": b_hco3_high,
            "pco2_low": b_pco2_low,
        }
    )
    reads = {"hco3": hco3, "pco2_vent": pco2_vent}
    if hco3 is None or pco2_vent is None:
        skipped(
            22,
            rule,
            "primary",
            title,
            reads,
            params,
            [n for n, v in (("hco3", hco3), ("pco2_vent", pco2_vent)) if v is None],
        )
    else:
        c = (r_hco3 < hco3_low and r_pv > pco2_high) or (r_hco3 > hco3_high and r_pv < pco2_low)
        O.append(FIRED if c else NOT_FIRED)
        if c:
            F.add("primary.opposite_directions")
            finding(
                "primary.opposite_directions",
                "primary",
                "warning",
                "PCO2 and HCO3 have moved in opposite directions: always a mixed disorder.",
                rule,
            )
        if T is not None:
            W, D = _explain(
                lambda q: (
                    (q(0, r_hco3 < hco3_low) and q(1, r_pv > pco2_high))
                    or (q(2, r_hco3 > hco3_high) and q(3, r_pv < pco2_low))
                ),
                c,
            )
            event(
                rule,
                "primary",
                title,
                c,
                reads,
                params,
                [
                    _cmp("hco3", hco3, r_hco3, "<", "hco3_low", hco3_low, W.get(0), D.get(0, False)),
                    _cmp(
                        "pco2_vent", pco2_vent, r_pv, ">", "pco2_high", pco2_high, W.get(1), D.get(1, False)
                    ),
                    _cmp("hco3", hco3, r_hco3, ">", "hco3_high", hco3_high, W.get(2), D.get(2, False)),
                    _cmp("pco2_vent", pco2_vent, r_pv, "<", "pco2_low", pco2_low, W.get(3), D.get(3, False)),
                ],
                ["primary.opposite_directions"],
            )
    # unclassified
    rule, title = "primary.unclassified", "Abnormal pH without a nameable primary"
    params = None if T is None else {"ph_high": b_ph_high, "ph_low": b_ph_low}
    reads = {"hco3": hco3, "pco2": pco2, "ph": ph}
    if hco3 is None or pco2 is None or ph is None:
        skipped(
            23,
            rule,
            "primary",
            title,
            reads,
            params,
            [n for n, v in (("hco3", hco3), ("pco2", pco2), ("ph", ph)) if v is None],
        )
    else:
        c = (r_ph < ph_low or r_ph > ph_high) and not (PA in F or PRA in F or PMA in F or PRL in F)
        O.append(FIRED if c else NOT_FIRED)
        if c:
            F.add(rule)
            finding(
                rule,
                "primary",
                "warning",
                f"The pH {t_ph} is outside its interval but no primary disorder can be named "
                f"(HCO3 {t_hco3}, PCO2 {t_pco2}).",
                rule,
            )
        if T is not None:
            W, D = _explain(
                lambda q: (
                    (q(0, r_ph < ph_low) or q(1, r_ph > ph_high))
                    and not (PA in F or PRA in F or PMA in F or PRL in F)
                ),
                c,
            )
            event(
                rule,
                "primary",
                title,
                c,
                reads,
                params,
                [
                    _cmp("ph", ph, r_ph, "<", "ph_low", ph_low, W.get(0), D.get(0, False)),
                    _cmp("ph", ph, r_ph, ">", "ph_high", ph_high, W.get(1), D.get(1, False)),
                ],
                [rule],
            )

    # --------------------------------------------------------------- anion gap: values and notes
    t_ag = _t(anion_gap, 10.0, "%.1f mmol/L")
    c = agc is not None
    O.append(FIRED if c else NOT_FIRED)
    if c:
        F.add("anion_gap.albumin_corrected")
        finding(
            "anion_gap.albumin_corrected",
            "anion_gap",
            "info",
            f"Anion gap {t_ag}; with albumin {_t(albumin, 10.0, '%.1f g/L')} the Figge-corrected gap is "
            f"{_t(agc, 10.0, '%.1f mmol/L')} (normal albumin {_P['albumin_normal']}).",
            "anion_gap.albumin_corrected",
        )
    if T is not None:
        event(
            "anion_gap.albumin_corrected",
            "anion_gap",
            "Albumin-corrected anion gap",
            c,
            {"anion_gap_albumin_corrected": agc},
            None,
            None,
            ["anion_gap.albumin_corrected"],
        )
    reads = {"albumin": albumin, "anion_gap": anion_gap}
    if anion_gap is None:
        skipped(25, "anion_gap.albumin_missing", "anion_gap", "Albumin not given", reads, None, ["anion_gap"])
    else:
        c = albumin is None
        O.append(FIRED if c else NOT_FIRED)
        if c:
            F.add("anion_gap.albumin_missing")
            finding(
                "anion_gap.albumin_missing",
                "anion_gap",
                "info",
                f"Albumin not given: the anion gap {t_ag} is not corrected; a low albumin would hide a "
                "high-gap acidosis.",
                "anion_gap.albumin_missing",
            )
        if T is not None:
            event(
                "anion_gap.albumin_missing",
                "anion_gap",
                "Albumin not given",
                c,
                reads,
                None,
                None,
                ["anion_gap.albumin_missing"],
            )
    r_ag = None if ag_used is None else _rnd(ag_used, 10.0)
    t_agu = _t(ag_used, 10.0, "%.1f mmol/L")
    params = None if T is None else {"ag_very_low": PE["ag_very_low"]}
    if ag_used is None:
        skipped(
            26,
            "anion_gap.very_low",
            "anion_gap",
            "Very low anion gap",
            {"ag_used": None},
            params,
            ["ag_used"],
        )
    else:
        c = r_ag < 2.0
        O.append(FIRED if c else NOT_FIRED)
        if c:
            F.add("anion_gap.very_low")
            finding(
                "anion_gap.very_low",
                "anion_gap",
                "warning",
                f"Anion gap {t_agu} is below {_P['ag_very_low']}: check albumin; consider a paraprotein, "
                "lithium, bromide or a laboratory error.",
                "anion_gap.very_low",
            )
        if T is not None:
            W, D = _explain(lambda q: q(0, r_ag < 2.0), c)
            event(
                "anion_gap.very_low",
                "anion_gap",
                "Very low anion gap",
                c,
                {"ag_used": ag_used},
                params,
                [_cmp("ag_used", ag_used, r_ag, "<", "ag_very_low", 2.0, W.get(0), D.get(0, False))],
                ["anion_gap.very_low"],
            )

    # --------------------------------------------------------------- metabolic compensation
    exp_pco2 = exp_lo = exp_hi = None
    if hco3 is not None and (PA in F or PMA in F):
        acid = PA in F
        exp_pco2 = float(1.5 * hco3 + 8.0 if acid else 40.0 + 0.7 * (hco3 - 24.0))
        exp_lo = float(exp_pco2 - 2.0)
        exp_hi = float(exp_pco2 + 2.0)
    r_lo = None if exp_lo is None else _rnd(exp_lo, 10.0)
    r_hi = None if exp_hi is None else _rnd(exp_hi, 10.0)
    t_range = f"{_t(exp_lo, 10.0, '%.1f mmHg')}-{_t(exp_hi, 10.0, '%.1f mmHg')}"
    ok = pco2_vent is not None and exp_lo is not None and exp_hi is not None
    reads = {"expected_pco2_high": exp_hi, "expected_pco2_low": exp_lo, "pco2_vent": pco2_vent}
    for primary, kind in ((PA, "acidosis"), (PMA, "alkalosis")):
        base = f"compensation.metabolic_{kind}."
        has_p = primary in F
        # appropriate
        c = ok and has_p and r_lo <= r_pv <= r_hi
        O.append(FIRED if c else NOT_FIRED)
        if c:
            F.add("compensation.appropriate")
            finding(
                "compensation.appropriate",
                "compensation",
                "info",
                f"PaCO2 {t_pco2} is within the range expected by Winter's formula ({t_range})."
                if kind == "acidosis"
                else f"PaCO2 {t_pco2} is within the range expected for the metabolic alkalosis ({t_range}).",
                base + "appropriate",
            )
        if T is not None:
            W, D = _explain(lambda q: ok and has_p and q(0, r_lo <= r_pv <= r_hi), c)
            event(
                base + "appropriate",
                "compensation",
                f"Respiratory response to metabolic {kind} as expected",
                c,
                reads,
                None,
                [
                    _cmp(
                        "expected_pco2_low", exp_lo, r_lo, "<=", "pco2_vent", r_pv, W.get(0), D.get(0, False)
                    ),
                    _cmp(
                        "pco2_vent",
                        pco2_vent,
                        r_pv,
                        "<=",
                        "expected_pco2_high",
                        r_hi,
                        W.get(0),
                        D.get(0, False),
                    ),
                ],
                ["compensation.appropriate"],
            )
        # PCO2 high
        c = ok and has_p and r_pv > r_hi
        O.append(FIRED if c else NOT_FIRED)
        if c:
            F.add("compensation.pco2_above_expected")
            F.add("respiratory_acidosis")
            if "respiratory_acidosis" not in disorders:
                disorders.append("respiratory_acidosis")
            finding(
                "compensation.pco2_above_expected",
                "compensation",
                "warning",
                f"PaCO2 {t_pco2} is above the expected range {t_range}: a respiratory acidosis is present as well.",
                base + "pco2_high",
            )
        if T is not None:
            W, D = _explain(lambda q: ok and has_p and q(0, r_pv > r_hi), c)
            event(
                base + "pco2_high",
                "compensation",
                "PaCO2 above Winter's range"
                if kind == "acidosis"
                else "PaCO2 above the metabolic alkalosis range",
                c,
                reads,
                None,
                [
                    _cmp(
                        "pco2_vent",
                        pco2_vent,
                        r_pv,
                        ">",
                        "expected_pco2_high",
                        r_hi,
                        W.get(0),
                        D.get(0, False),
                    )
                ],
                ["compensation.pco2_above_expected", "respiratory_acidosis"],
            )
        # PCO2 low
        c = ok and has_p and r_pv < r_lo
        O.append(FIRED if c else NOT_FIRED)
        if c:
            F.add("compensation.pco2_below_expected")
            F.add("respiratory_alkalosis")
            if "respiratory_alkalosis" not in disorders:
                disorders.append("respiratory_alkalosis")
            finding(
                "compensation.pco2_below_expected",
                "compensation",
                "warning",
                f"PaCO2 {t_pco2} is below the expected range {t_range}: a respiratory alkalosis is present as well.",
                base + "pco2_low",
            )
        if T is not None:
            W, D = _explain(lambda q: ok and has_p and q(0, r_pv < r_lo), c)
            event(
                base + "pco2_low",
                "compensation",
                "PaCO2 below Winter's range"
                if kind == "acidosis"
                else "PaCO2 below the metabolic alkalosis range",
                c,
                reads,
                None,
                [
                    _cmp(
                        "pco2_vent",
                        pco2_vent,
                        r_pv,
                        "<",
                        "expected_pco2_low",
                        r_lo,
                        W.get(0),
                        D.get(0, False),
                    )
                ],
                ["compensation.pco2_below_expected", "respiratory_alkalosis"],
            )
    c = (PA in F or PMA in F) and pco2_vent is None
    O.append(FIRED if c else NOT_FIRED)
    if c:
        F.add("compensation.not_assessable")
        finding(
            "compensation.not_assessable",
            "compensation",
            "info",
            "The PCO2 of this sample does not stand for the arterial PCO2: the respiratory response cannot be judged.",
            "compensation.metabolic_not_assessable",
        )
    if T is not None:
        event(
            "compensation.metabolic_not_assessable",
            "compensation",
            "Respiratory response not assessable on this sample",
            c,
            {"pco2_vent": pco2_vent},
            None,
            None,
            ["compensation.not_assessable"],
        )

    # --------------------------------------------------------------- respiratory compensation
    exp_a = exp_c = a_lo = a_hi = c_lo = c_hi = None
    if pco2 is not None and (PRA in F or PRL in F):
        acid = PRA in F
        exp_a = float(24.0 + (0.1 if acid else 0.2) * (pco2 - 40.0))
        exp_c = float(24.0 + (0.35 if acid else 0.4) * (pco2 - 40.0))
        a_lo, a_hi = float(exp_a - 2.0), float(exp_a + 2.0)
        c_lo, c_hi = float(exp_c - 2.0), float(exp_c + 2.0)
    bands = {"acute": (exp_a, a_lo, a_hi), "chronic": (exp_c, c_lo, c_hi)}
    for primary, label, dis in (
        (PRA, "respiratory acidosis", "respiratory_acidosis"),
        (PRL, "respiratory alkalosis", "respiratory_alkalosis"),
    ):
        has_p = primary in F
        i0 = 34 if dis == "respiratory_acidosis" else 41
        for j, chron in enumerate(("acute", "chronic")):
            exp, lo, hi = bands[chron]
            r_blo = None if lo is None else _rnd(lo, 10.0)
            r_bhi = None if hi is None else _rnd(hi, 10.0)
            n_lo, n_hi = f"expected_hco3_{chron}_low", f"expected_hco3_{chron}_high"
            reads = {"chronicity": chronicity, n_lo: lo, "hco3": hco3, n_hi: hi}
            rng = f"{_t(lo, 10.0, '%.1f mmol/L')}-{_t(hi, 10.0, '%.1f mmol/L')}"
            base = f"compensation.{dis}.{chron}_"
            gate = has_p and chronicity == chron and lo is not None and hi is not None
            for m, (kind, title, code, sev, asserted) in enumerate(
                (
                    (
                        "fits",
                        f"HCO3 fits {chron} {label}",
                        "compensation.appropriate",
                        "info",
                        ["compensation.appropriate"],
                    ),
                    (
                        "hco3_high",
                        f"HCO3 above the {chron} {label} range",
                        "compensation.hco3_above_expected",
                        "warning",
                        ["compensation.hco3_above_expected", "metabolic_alkalosis"],
                    ),
                    ("hco3_low", f"HCO3 below the {chron} {label} range", BELOW, "warning", [BELOW]),
                )
            ):
                rule = base + kind
                if hco3 is None or chronicity is None:
                    skipped(
                        i0 + 3 * j + m,
                        rule,
                        "compensation",
                        title,
                        reads,
                        None,
                        [n for n, v in (("chronicity", chronicity), ("hco3", hco3)) if v is None],
                    )
                    continue
                if kind == "fits":
                    c = gate and r_blo <= r_hco3 <= r_bhi
                elif kind == "hco3_high":
                    c = gate and r_hco3 > r_bhi
                else:
                    c = gate and r_hco3 < r_blo
                O.append(FIRED if c else NOT_FIRED)
                if c:
                    F.update(asserted)
                    if kind == "hco3_high" and "metabolic_alkalosis" not in disorders:
                        disorders.append("metabolic_alkalosis")
                    qualifiers.setdefault(dis, chron)
                    if kind == "fits":
                        text = (
                            f"HCO3 {t_hco3} is within the range expected for {chron} {label} ({rng}; "
                            f"expected {_t(exp, 10.0, '%.1f mmol/L')})."
                        )
                    elif kind == "hco3_high":
                        text = (
                            f"HCO3 {t_hco3} is above the range expected for {chron} {label} ({rng}): "
                            "a metabolic alkalosis is present as well."
                        )
                    else:
                        text = (
                            f"HCO3 {t_hco3} is below the range expected for {chron} {label} ({rng}): "
                            "a metabolic acidosis is present as well."
                        )
                    finding(code, "compensation", sev, text, rule)
                if T is not None:
                    # node 0 is the chronicity test (text); node 1 the numeric comparison
                    if kind == "fits":
                        W, D = _explain(lambda q: gate and q(1, r_blo <= r_hco3 <= r_bhi), c)
                        comps = [
                            _cmp(n_lo, lo, r_blo, "<=", "hco3", r_hco3, W.get(1), D.get(1, False)),
                            _cmp("hco3", hco3, r_hco3, "<=", n_hi, r_bhi, W.get(1), D.get(1, False)),
                        ]
                    elif kind == "hco3_high":
                        W, D = _explain(lambda q: gate and q(1, r_hco3 > r_bhi), c)
                        comps = [_cmp("hco3", hco3, r_hco3, ">", n_hi, r_bhi, W.get(1), D.get(1, False))]
                    else:
                        W, D = _explain(lambda q: gate and q(1, r_hco3 < r_blo), c)
                        comps = [_cmp("hco3", hco3, r_hco3, "<", n_lo, r_blo, W.get(1), D.get(1, False))]
                    event(rule, "compensation", title, c, reads, None, comps, asserted)
        rule = f"compensation.{dis}.chronicity_unknown"
        reads = {"chronicity": chronicity, "expected_hco3_acute": exp_a, "expected_hco3_chronic": exp_c}
        if chronicity is None:
            skipped(
                i0 + 6,
                rule,
                "compensation",
                "Chronicity not stated: both expectations shown",
                reads,
                None,
                ["chronicity"],
            )
            continue
        c = has_p and chronicity == "unknown" and exp_a is not None and exp_c is not None
        O.append(FIRED if c else NOT_FIRED)
        if c:
            F.add("compensation.chronicity_unknown")
            finding(
                "compensation.chronicity_unknown",
                "compensation",
                "info",
                f"Chronicity not stated. HCO3 {t_hco3}: expected {_t(exp_a, 10.0, '%.1f mmol/L')} if acute, "
                f"{_t(exp_c, 10.0, '%.1f mmol/L')} if chronic ({label}). Clinical history decides.",
                rule,
            )
        if T is not None:
            event(
                rule,
                "compensation",
                "Chronicity not stated: both expectations shown",
                c,
                reads,
                None,
                None,
                ["compensation.chronicity_unknown"],
            )

    # --------------------------------------------------------------- anion gap: type of acidosis
    acidosis = PA in F or BELOW in F
    p_ag_high = None if T is None else {"ag_high": PE["ag_high"]}
    if ag_used is None:
        skipped(
            48,
            "anion_gap.high_gap_acidosis",
            "anion_gap",
            "High anion gap metabolic acidosis",
            {"ag_used": None},
            p_ag_high,
            ["ag_used"],
        )
        skipped(
            49,
            "anion_gap.normal_gap_acidosis",
            "anion_gap",
            "Normal anion gap metabolic acidosis",
            {"ag_used": None},
            p_ag_high,
            ["ag_used"],
        )
    else:
        c = acidosis and r_ag > 12.0
        O.append(FIRED if c else NOT_FIRED)
        if c:
            F.add("anion_gap.high_gap_acidosis")
            F.add("metabolic_acidosis_high_anion_gap")
            disorders.append("metabolic_acidosis_high_anion_gap")
            finding(
                "anion_gap.high_gap_acidosis",
                "anion_gap",
                "warning",
                f"Anion gap {t_agu} (albumin-corrected when albumin is known) is above {_P['ag_high']}: "
                "a high-anion-gap acidosis.",
                "anion_gap.high_gap_acidosis",
            )
            heads.append((1, "anion_gap", "High anion gap metabolic acidosis"))
        if T is not None:
            W, D = _explain(lambda q: acidosis and q(0, r_ag > 12.0), c)
            event(
                "anion_gap.high_gap_acidosis",
                "anion_gap",
                "High anion gap metabolic acidosis",
                c,
                {"ag_used": ag_used},
                p_ag_high,
                [_cmp("ag_used", ag_used, r_ag, ">", "ag_high", 12.0, W.get(0), D.get(0, False))],
                ["anion_gap.high_gap_acidosis", "metabolic_acidosis_high_anion_gap"],
            )
        c = acidosis and r_ag <= 12.0
        O.append(FIRED if c else NOT_FIRED)
        if c:
            F.add("anion_gap.normal_gap_acidosis")
            F.add("metabolic_acidosis_normal_anion_gap")
            disorders.append("metabolic_acidosis_normal_anion_gap")
            finding(
                "anion_gap.normal_gap_acidosis",
                "anion_gap",
                "warning",
                f"Anion gap {t_agu} (albumin-corrected when albumin is known) is not above {_P['ag_high']}: "
                "a normal-anion-gap (hyperchloraemic) acidosis.",
                "anion_gap.normal_gap_acidosis",
            )
            heads.append((1, "anion_gap", "Normal anion gap metabolic acidosis"))
        if T is not None:
            W, D = _explain(lambda q: acidosis and q(0, r_ag <= 12.0), c)
            event(
                "anion_gap.normal_gap_acidosis",
                "anion_gap",
                "Normal anion gap metabolic acidosis",
                c,
                {"ag_used": ag_used},
                p_ag_high,
                [_cmp("ag_used", ag_used, r_ag, "<=", "ag_high", 12.0, W.get(0), D.get(0, False))],
                ["anion_gap.normal_gap_acidosis", "metabolic_acidosis_normal_anion_gap"],
            )
    c = acidosis and ag_used is None
    O.append(FIRED if c else NOT_FIRED)
    if c:
        F.add("anion_gap.not_available")
        F.add("metabolic_acidosis")
        disorders.append("metabolic_acidosis")
        finding(
            "anion_gap.not_available",
            "anion_gap",
            "warning",
            "A metabolic acidosis is present but sodium and chloride were not given, so its type cannot be assessed.",
            "anion_gap.acidosis_type_unknown",
        )
        heads.append((1, "anion_gap", "Metabolic acidosis"))
    if T is not None:
        event(
            "anion_gap.acidosis_type_unknown",
            "anion_gap",
            "Metabolic acidosis, anion gap not available",
            c,
            {"ag_used": ag_used},
            None,
            None,
            ["anion_gap.not_available", "metabolic_acidosis"],
        )
    if ag_used is None:
        skipped(
            51,
            "anion_gap.hidden_high_gap",
            "anion_gap",
            "High anion gap without a low HCO3 reading",
            {"ag_used": None},
            p_ag_high,
            ["ag_used"],
        )
    else:
        c = not (PA in F or BELOW in F or PMA in F) and r_ag > 12.0
        O.append(FIRED if c else NOT_FIRED)
        if c:
            F.add("anion_gap.hidden_high_gap")
            F.add("metabolic_acidosis_high_anion_gap")
            if "metabolic_acidosis_high_anion_gap" not in disorders:
                disorders.append("metabolic_acidosis_high_anion_gap")
            finding(
                "anion_gap.hidden_high_gap",
                "anion_gap",
                "warning",
                f"Anion gap {t_agu} is above {_P['ag_high']} although the pH, PCO2 and HCO3 named no metabolic "
                "acidosis: a high-anion-gap acidosis is present as well.",
                "anion_gap.hidden_high_gap",
            )
            heads.append((1, "anion_gap", "High anion gap metabolic acidosis"))
        if T is not None:
            W, D = _explain(lambda q: not (PA in F or BELOW in F or PMA in F) and q(0, r_ag > 12.0), c)
            event(
                "anion_gap.hidden_high_gap",
                "anion_gap",
                "High anion gap without a low HCO3 reading",
                c,
                {"ag_used": ag_used},
                p_ag_high,
                [_cmp("ag_used", ag_used, r_ag, ">", "ag_high", 12.0, W.get(0), D.get(0, False))],
                ["anion_gap.hidden_high_gap", "metabolic_acidosis_high_anion_gap"],
            )

    # --------------------------------------------------------------- delta analysis
    delta_ag = delta_hco3 = delta_ratio = delta_gap = None
    if "anion_gap.high_gap_acidosis" in F or "anion_gap.hidden_high_gap" in F:
        if ag_used is not None:
            delta_ag = float(ag_used - 10.0)
        if hco3 is not None:
            delta_hco3 = float(24.0 - hco3)
    r_dh = None if delta_hco3 is None else _rnd(delta_hco3, 10.0)
    if delta_ag is not None and delta_hco3 is not None:
        if r_dh >= 4.0:
            delta_ratio = float(delta_ag / delta_hco3)
        delta_gap = float(delta_ag - delta_hco3)
    r_dr = None if delta_ratio is None else _rnd(delta_ratio, 100.0)
    t_dr = _t(delta_ratio, 100.0, "%.2f")
    t_dag = _t(delta_ag, 10.0, "%.1f mmol/L")
    t_dh = _t(delta_hco3, 10.0, "%.1f mmol/L")
    known_dr = delta_ratio is not None
    reads = {"delta_ratio": delta_ratio}
    c = known_dr and r_dr < 0.4
    O.append(FIRED if c else NOT_FIRED)
    if c:
        F.update(("delta.ratio_low", "metabolic_acidosis_normal_anion_gap"))
        if "metabolic_acidosis_normal_anion_gap" not in disorders:
            disorders.append("metabolic_acidosis_normal_anion_gap")
        finding(
            "delta.ratio_low",
            "delta",
            "warning",
            f"Delta ratio {t_dr} (excess gap {t_dag} / fall in HCO3 {t_dh}) is below {_P['delta_ratio_low']}: "
            "a normal-gap acidosis predominates.",
            "delta.ratio_normal_gap_predominates",
        )
    if T is not None:
        W, D = _explain(lambda q: known_dr and q(0, r_dr < 0.4), c)
        event(
            "delta.ratio_normal_gap_predominates",
            "delta",
            "Delta ratio low - normal-gap acidosis predominates",
            c,
            reads,
            {"delta_ratio_low": PE["delta_ratio_low"]},
            [_cmp("delta_ratio", delta_ratio, r_dr, "<", "delta_ratio_low", 0.4, W.get(0), D.get(0, False))],
            ["delta.ratio_low", "metabolic_acidosis_normal_anion_gap"],
        )
    c = known_dr and 0.4 <= r_dr < 0.8
    O.append(FIRED if c else NOT_FIRED)
    if c:
        F.update(("delta.ratio_mixed", "metabolic_acidosis_normal_anion_gap"))
        if "metabolic_acidosis_normal_anion_gap" not in disorders:
            disorders.append("metabolic_acidosis_normal_anion_gap")
        finding(
            "delta.ratio_mixed",
            "delta",
            "warning",
            f"Delta ratio {t_dr} is between {_P['delta_ratio_low']} and {_P['delta_ratio_pure_low']}: "
            "a normal-gap acidosis is present beside the high-gap acidosis.",
            "delta.ratio_mixed_gap",
        )
    if T is not None:
        W, D = _explain(lambda q: known_dr and q(0, 0.4 <= r_dr < 0.8), c)
        event(
            "delta.ratio_mixed_gap",
            "delta",
            "Delta ratio low - mixed high and normal gap acidosis",
            c,
            reads,
            {"delta_ratio_low": PE["delta_ratio_low"], "delta_ratio_pure_low": PE["delta_ratio_pure_low"]},
            [
                _cmp(
                    "delta_ratio", delta_ratio, r_dr, ">=", "delta_ratio_low", 0.4, W.get(0), D.get(0, False)
                ),
                _cmp(
                    "delta_ratio",
                    delta_ratio,
                    r_dr,
                    "<",
                    "delta_ratio_pure_low",
                    0.8,
                    W.get(0),
                    D.get(0, False),
                ),
            ],
            ["delta.ratio_mixed", "metabolic_acidosis_normal_anion_gap"],
        )
    c = known_dr and 0.8 <= r_dr <= 2.0
    O.append(FIRED if c else NOT_FIRED)
    if c:
        F.add("delta.ratio_uncomplicated")
        finding(
            "delta.ratio_uncomplicated",
            "delta",
            "info",
            f"Delta ratio {t_dr} is between {_P['delta_ratio_pure_low']} and {_P['delta_ratio_high']}: "
            "consistent with an uncomplicated high-gap acidosis.",
            "delta.ratio_uncomplicated",
        )
    if T is not None:
        W, D = _explain(lambda q: known_dr and q(0, 0.8 <= r_dr <= 2.0), c)
        event(
            "delta.ratio_uncomplicated",
            "delta",
            "Delta ratio in the uncomplicated band",
            c,
            reads,
            {"delta_ratio_high": PE["delta_ratio_high"], "delta_ratio_pure_low": PE["delta_ratio_pure_low"]},
            [
                _cmp(
                    "delta_ratio",
                    delta_ratio,
                    r_dr,
                    ">=",
                    "delta_ratio_pure_low",
                    0.8,
                    W.get(0),
                    D.get(0, False),
                ),
                _cmp(
                    "delta_ratio", delta_ratio, r_dr, "<=", "delta_ratio_high", 2.0, W.get(0), D.get(0, False)
                ),
            ],
            ["delta.ratio_uncomplicated"],
        )
    c = known_dr and r_dr > 2.0
    O.append(FIRED if c else NOT_FIRED)
    if c:
        F.update(("delta.ratio_high", "metabolic_alkalosis"))
        if "metabolic_alkalosis" not in disorders:
            disorders.append("metabolic_alkalosis")
        finding(
            "delta.ratio_high",
            "delta",
            "warning",
            f"Delta ratio {t_dr} (excess gap {t_dag} / fall in HCO3 {t_dh}) is above {_P['delta_ratio_high']}: "
            "a metabolic alkalosis is present beside the high-gap acidosis.",
            "delta.ratio_high",
        )
    if T is not None:
        W, D = _explain(lambda q: known_dr and q(0, r_dr > 2.0), c)
        event(
            "delta.ratio_high",
            "delta",
            "Delta ratio high - metabolic alkalosis",
            c,
            reads,
            {"delta_ratio_high": PE["delta_ratio_high"]},
            [_cmp("delta_ratio", delta_ratio, r_dr, ">", "delta_ratio_high", 2.0, W.get(0), D.get(0, False))],
            ["delta.ratio_high", "metabolic_alkalosis"],
        )
    c = delta_hco3 is not None and r_dh < 4.0
    O.append(FIRED if c else NOT_FIRED)
    if c:
        F.add("delta.ratio_not_computed")
        finding(
            "delta.ratio_not_computed",
            "delta",
            "info",
            f"The fall in HCO3 ({t_dh}) is below {_P['delta_min_dhco3']}: the delta ratio is not computed; "
            f"the delta gap is {_t(delta_gap, 10.0, '%.1f mmol/L')}.",
            "delta.ratio_not_computed",
        )
    if T is not None:
        W, D = _explain(lambda q: delta_hco3 is not None and q(0, r_dh < 4.0), c)
        event(
            "delta.ratio_not_computed",
            "delta",
            "Fall in HCO3 too small for a delta ratio",
            c,
            {"delta_hco3": delta_hco3},
            {"delta_min_dhco3": PE["delta_min_dhco3"]},
            [_cmp("delta_hco3", delta_hco3, r_dh, "<", "delta_min_dhco3", 4.0, W.get(0), D.get(0, False))],
            ["delta.ratio_not_computed"],
        )

    # --------------------------------------------------------------- oxygenation
    reads = {"fio2": fio2, "po2": po2, "sample_type": st, "so2": so2}
    if st is None:
        skipped(
            57,
            "oxygenation.not_arterial",
            "oxygenation",
            "Oxygenation not assessed on a non-arterial sample",
            reads,
            None,
            ["sample_type"],
        )
        skipped(
            58,
            "oxygenation.hypoxaemia",
            "oxygenation",
            "Arterial hypoxaemia",
            {"po2": po2, "sample_type": st},
            None if T is None else {"po2_low": PE["po2_low"]},
            ["sample_type"],
        )
    else:
        c = st != "arterial" and (po2 is not None or fio2 is not None or so2 is not None)
        O.append(FIRED if c else NOT_FIRED)
        if c:
            F.add("oxygenation.not_arterial")
            finding(
                "oxygenation.not_arterial",
                "oxygenation",
                "info",
                "Oxygenation rules run only on samples labelled arterial: the P/F ratio is not assessed for this sample.",
                "oxygenation.not_arterial",
            )
        if T is not None:
            event(
                "oxygenation.not_arterial",
                "oxygenation",
                "Oxygenation not assessed on a non-arterial sample",
                c,
                reads,
                None,
                None,
                ["oxygenation.not_arterial"],
            )
        c = st == "arterial" and po2 is not None and r_po2 < 80.0
        O.append(FIRED if c else NOT_FIRED)
        if c:
            F.add("oxygenation.hypoxaemia")
            finding(
                "oxygenation.hypoxaemia",
                "oxygenation",
                "warning",
                f"Arterial PO2 {_t(po2, 10.0, '%.1f mmHg')} is below {_P['po2_low']}: hypoxaemia.",
                "oxygenation.hypoxaemia",
            )
            heads.append((1, "oxygenation", "Hypoxaemia"))
        if T is not None:
            W, D = _explain(lambda q: st == "arterial" and po2 is not None and q(1, r_po2 < 80.0), c)
            event(
                "oxygenation.hypoxaemia",
                "oxygenation",
                "Arterial hypoxaemia",
                c,
                {"po2": po2, "sample_type": st},
                {"po2_low": PE["po2_low"]},
                [_cmp("po2", po2, r_po2, "<", "po2_low", 80.0, W.get(1), D.get(1, False))],
                ["oxygenation.hypoxaemia"],
            )
    r_pf = None if pf_ratio is None else _rnd(pf_ratio, 1.0)
    t_pf = _t(pf_ratio, 1.0, "%.0f mmHg")
    known_pf = pf_ratio is not None
    reads = {"pf_ratio": pf_ratio}
    c = known_pf and 200.0 < r_pf <= 300.0
    O.append(FIRED if c else NOT_FIRED)
    if c:
        F.add("oxygenation.pf_mild")
        finding(
            "oxygenation.pf_mild",
            "oxygenation",
            "warning",
            f"PaO2/FiO2 {t_pf} is above {_P['pf_moderate']} and at most {_P['pf_mild']}: the oxygenation "
            "criterion of the mild band is met (not a diagnosis).",
            "oxygenation.pf_mild",
        )
    if T is not None:
        W, D = _explain(lambda q: known_pf and q(0, 200.0 < r_pf <= 300.0), c)
        event(
            "oxygenation.pf_mild",
            "oxygenation",
            "P/F ratio in the mild band",
            c,
            reads,
            {"pf_mild": PE["pf_mild"], "pf_moderate": PE["pf_moderate"]},
            [
                _cmp("pf_ratio", pf_ratio, r_pf, ">", "pf_moderate", 200.0, W.get(0), D.get(0, False)),
                _cmp("pf_ratio", pf_ratio, r_pf, "<=", "pf_mild", 300.0, W.get(0), D.get(0, False)),
            ],
            ["oxygenation.pf_mild"],
        )
    c = known_pf and 100.0 < r_pf <= 200.0
    O.append(FIRED if c else NOT_FIRED)
    if c:
        F.add("oxygenation.pf_moderate")
        finding(
            "oxygenation.pf_moderate",
            "oxygenation",
            "warning",
            f"PaO2/FiO2 {t_pf} is above {_P['pf_severe']} and at most {_P['pf_moderate']}: the oxygenation "
            "criterion of the moderate band is met (not a diagnosis).",
            "oxygenation.pf_moderate",
        )
    if T is not None:
        W, D = _explain(lambda q: known_pf and q(0, 100.0 < r_pf <= 200.0), c)
        event(
            "oxygenation.pf_moderate",
            "oxygenation",
            "P/F ratio in the moderate band",
            c,
            reads,
            {"pf_moderate": PE["pf_moderate"], "pf_severe": PE["pf_severe"]},
            [
                _cmp("pf_ratio", pf_ratio, r_pf, ">", "pf_severe", 100.0, W.get(0), D.get(0, False)),
                _cmp("pf_ratio", pf_ratio, r_pf, "<=", "pf_moderate", 200.0, W.get(0), D.get(0, False)),
            ],
            ["oxygenation.pf_moderate"],
        )
    c = known_pf and r_pf <= 100.0
    O.append(FIRED if c else NOT_FIRED)
    if c:
        F.add("oxygenation.pf_severe")
        finding(
            "oxygenation.pf_severe",
            "oxygenation",
            "critical",
            f"PaO2/FiO2 {t_pf} is at most {_P['pf_severe']}: the oxygenation criterion of the severe band is "
            "met (not a diagnosis).",
            "oxygenation.pf_severe",
        )
        heads.append((0, "oxygenation", "Severe hypoxaemia"))
    if T is not None:
        W, D = _explain(lambda q: known_pf and q(0, r_pf <= 100.0), c)
        event(
            "oxygenation.pf_severe",
            "oxygenation",
            "P/F ratio in the severe band",
            c,
            reads,
            {"pf_severe": PE["pf_severe"]},
            [_cmp("pf_ratio", pf_ratio, r_pf, "<=", "pf_severe", 100.0, W.get(0), D.get(0, False))],
            ["oxygenation.pf_severe"],
        )

    # --------------------------------------------------------------- notes
    reads = {"anion_gap": anion_gap, "hco3": hco3}
    if hco3 is None:
        skipped(62, "note.electrolytes_missing", "note", "Electrolytes not given", reads, None, ["hco3"])
    else:
        c = anion_gap is None
        O.append(FIRED if c else NOT_FIRED)
        if c:
            F.add("note.electrolytes_missing")
            finding(
                "note.electrolytes_missing",
                "note",
                "info",
                "Sodium and chloride were not given: the anion gap and mixed metabolic disorders cannot be assessed.",
                "note.electrolytes_missing",
            )
        if T is not None:
            event(
                "note.electrolytes_missing",
                "note",
                "Electrolytes not given",
                c,
                reads,
                None,
                None,
                ["note.electrolytes_missing"],
            )

    vals.update(
        delta_ag=delta_ag,
        delta_hco3=delta_hco3,
        delta_ratio=delta_ratio,
        delta_gap=delta_gap,
        expected_pco2=exp_pco2,
        expected_pco2_low=exp_lo,
        expected_pco2_high=exp_hi,
        expected_hco3_acute=exp_a,
        expected_hco3_chronic=exp_c,
    )
    return _assemble(
        tw, result, I, vals, O, missing_of, findings, disorders, qualifiers, heads, cautions, "interpreted", T
    )


# Reported values in the engine's order: name -> (scale, unit).
REPORTED = {
    "calculated_ph": (1000.0, "[pH]"),
    "calculated_hco3": (100.0, "mmol/L"),
    "hco3_discrepancy": (100.0, "mmol/L"),
    "anion_gap": (10.0, "mmol/L"),
    "anion_gap_albumin_corrected": (10.0, "mmol/L"),
    "delta_ag": (10.0, "mmol/L"),
    "delta_hco3": (10.0, "mmol/L"),
    "delta_ratio": (100.0, "1"),
    "delta_gap": (10.0, "mmol/L"),
    "expected_pco2": (10.0, "mm[Hg]"),
    "expected_pco2_low": (10.0, "mm[Hg]"),
    "expected_pco2_high": (10.0, "mm[Hg]"),
    "expected_hco3_acute": (10.0, "mmol/L"),
    "expected_hco3_chronic": (10.0, "mmol/L"),
    "pf_ratio": (1.0, "mm[Hg]"),
}
# A reported value is unavailable ("needs ...") when a name it reads directly is unavailable; it
# then names the inputs it rests on that were not given. name -> (direct needs, inputs beneath),
# in the order the engine lists them (its evaluation order).
VALUE_NEEDS = (
    ("calculated_hco3", ("ph", "pco2"), ("pco2", "ph")),
    ("hco3_discrepancy", ("hco3", "calculated_hco3"), ("hco3", "pco2", "ph")),
    ("calculated_ph", ("hco3", "pco2"), ("hco3", "pco2")),
    ("anion_gap", ("na", "cl", "hco3"), ("cl", "hco3", "na")),
    ("anion_gap_albumin_corrected", ("anion_gap", "albumin"), ("albumin", "cl", "hco3", "na")),
    ("expected_pco2", ("hco3",), ("hco3",)),
    ("expected_pco2_low", ("expected_pco2",), ("hco3",)),
    ("expected_pco2_high", ("expected_pco2",), ("hco3",)),
    ("expected_hco3_acute", ("pco2",), ("pco2",)),
    ("expected_hco3_chronic", ("pco2",), ("pco2",)),
    ("delta_ag", ("ag_used",), ("cl", "hco3", "na")),
    ("delta_hco3", ("hco3",), ("hco3",)),
    ("delta_ratio", ("delta_ag", "delta_hco3"), ("cl", "hco3", "na")),
    ("delta_gap", ("delta_ag", "delta_hco3"), ("cl", "hco3", "na")),
    ("pf_ratio", ("po2", "fio2", "sample_type"), ("fio2", "po2", "sample_type")),
)


def _assemble(
    tw: Twin,
    result: dict[str, Any],
    I: dict[str, Any],
    vals: dict[str, Any],
    O: list[int],
    missing_of: dict[int, list[str]],
    findings: list[dict[str, Any]],
    disorders: list[str],
    qualifiers: dict[str, str],
    heads: list[tuple[int, str, str]],
    cautions: list[str],
    status: str,
    T: list[Any] | None,
) -> dict[str, Any]:
    values: dict[str, float] = {}
    units: dict[str, str] = {}
    for name, (scale, unit) in REPORTED.items():
        v = vals[name]
        if v is not None:
            values[name] = _rnd(v, scale)
            units[name] = unit
    not_assessed: list[dict[str, Any]] = []
    halted_steps = []
    for label, core, idx in STEPS:
        if any(O[i] < 2 for i in idx):
            continue
        if all(O[i] == HALTED for i in idx):
            halted_steps.append(label)
        else:
            missing = sorted({n for i in idx if O[i] == SKIPPED for n in missing_of[i]})
            not_assessed.append({"what": label, "why": "needs " + ", ".join(missing), "core": core})
    groups: dict[str, list[str]] = {}
    for name, direct, beneath in VALUE_NEEDS:
        if any((vals[n] if n in vals else I[n]) is None for n in direct):
            groups.setdefault(", ".join(n for n in beneath if I[n] is None), []).append(name)
    for why, names in groups.items():
        not_assessed.append(
            {
                "what": ", ".join(names),
                "core": False,
                "why": "needs " + why if why else "a value it depends on does not apply to this case",
            }
        )
    if halted_steps:
        not_assessed.insert(
            0,
            {
                "what": ", ".join(halted_steps),
                "core": False,
                "why": "not evaluated: rule consistency.hh_ph stopped the interpretation",
            },
        )
    if status == "inconsistent":
        disorders, qualifiers = [], {}
    elif any(n["core"] for n in not_assessed):
        status = "partial"
    core_missing = [n["what"] for n in not_assessed if n["core"]]
    for n in not_assessed:
        del n["core"]
    findings.sort(key=lambda f: 0 if f["severity"] == "critical" else 1)
    result.update(
        status=status,
        headline=_headline(status, disorders, qualifiers, heads, core_missing),
        errors=[],
        inputs={k: v for k, v in I.items() if v is not None},
        values=values,
        units=units,
        findings=findings,
        disorders=disorders,
        qualifiers=qualifiers,
        not_assessed=not_assessed,
        cautions=cautions + list(CAUTIONS),
        trace=T if T is not None else [],
        calculated=[],
    )
    return result

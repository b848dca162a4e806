"""Seeded generator of invented, physiologically coherent blood gas cases (demo data only).

Feeds the engine benchmark, the change-control demo corpus and the integration demo data.
Every case is a dict in the engine's case contract: ``case_id`` ("D000001"...), ``context``
({ward: ICU|ED|WARD, collected_at: ISO 8601 UTC, record_number: invented}) and inputs in the
canonical unit or as ``{"value": x, "unit": "<UCUM>"}``.

**The numbers in this module are for synthesis only.** They shape plausible invented data
(scenario mix, severity ranges, noise); they are not clinical thresholds. The engine takes every
clinical number from the rulebook, never from here. No real patient, record number or hospital
is represented.

How a case is drawn (one scenario, then values that follow from it):

1. Scenario: ward (mix table), out-of-scope flag (age < 18, pregnant), at most one respiratory
   disorder (acute or chronic) combined with a metabolic set from ``METABOLIC_SETS`` (none,
   high-gap acidosis, normal-gap acidosis, metabolic alkalosis, high-gap + normal-gap,
   high-gap + alkalosis). A normal-gap acidosis together with a metabolic alkalosis is left out:
   both act on chloride and bicarbonate in opposite directions, so the numbers cannot show it.
2. HCO3 from the metabolic set; PCO2 from the usual secondary response to it (Winter's
   formula, albert1967; 0.7 per mmol/L for alkalosis, berend2014); a respiratory disorder then moves
   PCO2 and HCO3 together along the acute or chronic slope (adrogue2010).
   Keys name entries of rulebooks/bibliography.yaml.
3. pH by Henderson-Hasselbalch, pH = 6.1 + log10(HCO3 / (0.0307 x PCO2)) (nccls1994),
   computed from the values *as reported* (after rounding and any kPa conversion) plus at most
   +/-0.008 of measurement noise, so a consistency check with 0.03 pH tolerance passes.
   About 1 % of cases are then made deliberately inconsistent (transcription-like errors).
4. Na, Cl and albumin so that Na - (Cl + HCO3) is the scenario's gap after the usual albumin
   effect (Figge 1998, 0.25 per g/L: figge1998); optional chemistry, oxygenation and
   ventilator data by ward.

Deterministic: one ``random.Random(seed)`` per call, no global random state, no clock.
"""

from __future__ import annotations

import math
import random
from collections.abc import Iterator
from datetime import date
from typing import Any, NamedTuple

__all__ = [
    "ALTERNATIVE_UNITS",
    "CANONICAL_UNITS",
    "CODED_INPUTS",
    "CONTEXT_KEYS",
    "INPUT_KEYS",
    "MALFORMED_KINDS",
    "METABOLIC_SETS",
    "MIXES",
    "RESPIRATORY",
    "Scenario",
    "generate_cases",
    "generate_corpus",
    "generate_labelled",
    "hh_ph",
    "malformed_cases",
    "to_canonical",
]

# ----------------------------------------------------------------------------- contract tables
CANONICAL_UNITS: dict[str, str] = {
    "ph": "[pH]",
    "pco2": "mm[Hg]",
    "po2": "mm[Hg]",
    "hco3": "mmol/L",
    "tco2": "mmol/L",
    "base_excess": "mmol/L",
    "na": "mmol/L",
    "k": "mmol/L",
    "cl": "mmol/L",
    "albumin": "g/L",
    "lactate": "mmol/L",
    "glucose": "mmol/L",
    "urea": "mmol/L",
    "bun": "mg/dL",
    "creatinine": "umol/L",
    "osmolality": "mosm/kg",
    "ethanol": "mmol/L",
    "phosphate": "mmol/L",
    "ionized_calcium": "mmol/L",
    "magnesium": "mmol/L",
    "hb": "g/dL",
    "so2": "1",
    "fio2": "1",
    "barometric_pressure": "mm[Hg]",
    "temperature": "Cel",
    "age": "a",
    "peep": "cm[H2O]",
    "etco2": "mm[Hg]",
    "minute_ventilation": "L/min",
    "predicted_body_weight": "kg",
    "urine_na": "mmol/L",
    "urine_k": "mmol/L",
    "urine_cl": "mmol/L",
}
CODED_INPUTS: dict[str, tuple[str, ...]] = {
    "sample_type": ("arterial", "venous", "capillary", "mixed_venous", "unknown"),
    "chronicity": ("acute", "chronic", "unknown"),
}
INPUT_KEYS: frozenset[str] = frozenset(CANONICAL_UNITS) | frozenset(CODED_INPUTS) | {"pregnant"}
CONTEXT_KEYS: tuple[str, ...] = ("ward", "collected_at", "record_number")

# Non-canonical units this generator writes: unit -> factor to the canonical unit.
ALTERNATIVE_UNITS: dict[str, dict[str, float]] = {
    "pco2": {"kPa": 7.50062},
    "po2": {"kPa": 7.50062},
    "etco2": {"kPa": 7.50062},
    "albumin": {"g/dL": 10.0},
    "fio2": {"%": 0.01},
    "so2": {"%": 0.01},
    "glucose": {"mg/dL": 0.0555062},
}

RESPIRATORY: tuple[str, ...] = ("none", "respiratory_acidosis", "respiratory_alkalosis")
HAGMA, NAGMA, MALK = (
    "metabolic_acidosis_high_anion_gap",
    "metabolic_acidosis_normal_anion_gap",
    "metabolic_alkalosis",
)
METABOLIC_SETS: tuple[tuple[str, ...], ...] = (
    (),
    (HAGMA,),
    (NAGMA,),
    (MALK,),
    (HAGMA, NAGMA),
    (HAGMA, MALK),
)

# ----------------------------------------------------------------------------- synthesis mix
# ward -> (share, venous share, ventilated share, fio2 given share). Synthesis only.
_WARDS: dict[str, tuple[float, float, float, float]] = {
    "ICU": (0.35, 0.05, 0.55, 0.70),
    "ED": (0.40, 0.35, 0.02, 0.30),
    "WARD": (0.25, 0.15, 0.0, 0.25),
}
MIXES: dict[str, dict[str, float]] = {
    "hospital": {"ICU": 0.35, "ED": 0.40, "WARD": 0.25},
    "icu": {"ICU": 1.0},
    "ed": {"ED": 1.0},
    "ward": {"WARD": 1.0},
}
_METABOLIC_WEIGHTS = (0.38, 0.18, 0.10, 0.12, 0.10, 0.12)  # per METABOLIC_SETS entry
_RESP_WEIGHTS = (0.50, 0.27, 0.23)  # per RESPIRATORY entry
_ALBUMIN_BY_WARD = {"ICU": (27.0, 6.0), "ED": (38.0, 5.0), "WARD": (33.0, 6.0)}
_SHARE_INCONSISTENT = 0.01
_SHARE_CHILD = 0.01
_SHARE_PREGNANT = 0.01
_SHARE_NO_ELECTROLYTES = 0.12
_SHARE_NO_ALBUMIN = 0.35
_SHARE_KPA = 0.15
_SHARE_ALBUMIN_GDL = 0.15
_SHARE_FIO2_PERCENT = 0.30
_EPOCH = date(2026, 3, 2).toordinal()  # invented collection period start
_PH_NOISE = 0.008
_HHMM = tuple(f"{m // 60:02d}:{m % 60:02d}" for m in range(1440))
_SS = tuple(f"{sec:02d}" for sec in range(60))
_S, _PK, _LN10 = 0.0307, 6.1, math.log(10.0)


def hh_ph(hco3: float, pco2_mmhg: float) -> float:
    """Henderson-Hasselbalch pH from HCO3 (mmol/L) and PCO2 (mmHg); S 0.0307 from nccls1994, pK' 6.1 common practice."""
    return _PK + math.log10(hco3 / (_S * pco2_mmhg))


def to_canonical(name: str, value: Any) -> Any:
    """A value as written by this generator -> number in the canonical unit (codes unchanged)."""
    if isinstance(value, dict):
        return value["value"] * ALTERNATIVE_UNITS[name][value["unit"]]
    return value


class Scenario(NamedTuple):
    """What a generated case was drawn to show (the intended picture, not an engine verdict)."""

    ward: str
    respiratory: str  # one of RESPIRATORY
    chronicity: str | None  # acute | chronic for a respiratory disorder
    metabolic: tuple[str, ...]  # one of METABOLIC_SETS
    sample_type: str  # arterial | venous
    electrolytes: bool
    albumin: bool
    ventilated: bool
    kpa: bool
    out_of_scope: str | None  # None | "child" | "pregnant"
    inconsistent: str | None  # None | the transcription error applied

    @property
    def combination(self) -> str:
        """Disorder combination label, e.g. 'respiratory_acidosis/chronic+metabolic_alkalosis'."""
        resp = "none" if self.respiratory == "none" else f"{self.respiratory}/{self.chronicity}"
        return "+".join((resp, *self.metabolic)) if self.metabolic else resp


# ----------------------------------------------------------------------------- public API
def generate_labelled(
    n: int, seed: int = 0, *, mix: str = "hospital", start: int = 1
) -> Iterator[tuple[Scenario, dict[str, Any]]]:
    """Yield ``n`` (scenario, case) pairs; case ids run from ``D{start:06d}``."""
    if n < 0:
        raise ValueError(f"n must be >= 0, got {n}")
    if mix not in MIXES:
        raise ValueError(f"mix must be one of {sorted(MIXES)}, got {mix!r}")
    rng = random.Random(seed)
    u = rng.random
    wards = _cumulative(MIXES[mix])
    clock = 7 * 3600 + _below(u, 3600)
    dates: dict[int, str] = {}
    for i in range(start, start + n):
        clock += 20 + int(380 * u())
        day, secs = divmod(clock, 86400)
        if day not in dates:
            dates[day] = date.fromordinal(_EPOCH + day).isoformat()
        ctx = {
            "ward": _pick(rng, wards),
            "collected_at": f"{dates[day]}T{_HHMM[secs // 60]}:{_SS[secs % 60]}Z",
            "record_number": "DEMO%07d" % int(10_000_000 * u()),
        }
        yield _draw(rng, "D%06d" % i, ctx)


def generate_cases(
    n: int, seed: int = 0, *, mix: str = "hospital", with_scenario: bool = False
) -> Iterator[dict[str, Any]]:
    """Yield ``n`` invented cases. ``with_scenario`` adds ``context.scenario`` (the label)."""
    for scenario, case in generate_labelled(n, seed, mix=mix):
        if with_scenario:
            case["context"]["scenario"] = scenario.combination
        yield case


MALFORMED_KINDS: tuple[str, ...] = ("unknown_key", "text_value", "bad_unit", "out_of_range", "missing_value")

# kind -> list of (field, bad value). Synthesis only; out_of_range values are far outside any
# plausible bound (decimal slips), so no rulebook tuning can make them valid.
_MALFORMATIONS: dict[str, tuple[tuple[str, Any], ...]] = {
    "unknown_key": (("paco2", 41.2), ("bicarbonate", 23.0), ("sodium_serum", 139)),
    "text_value": (("ph", "7.3O"), ("hco3", "pending"), ("na", "haemolysed"), ("pco2", "see comment")),
    "bad_unit": (
        ("pco2", {"value": 41.2, "unit": "mg/dL"}),
        ("albumin", {"value": 3.1, "unit": "mmol/L"}),
        ("hco3", {"value": 22.0, "unit": "kPa"}),
    ),
    "out_of_range": (("ph", 73.4), ("na", 1390), ("pco2", 4120.0), ("k", 41.0)),
    "missing_value": (("ph", None), ("pco2", {"unit": "kPa"}), ("hco3", "")),
}


def malformed_cases(
    n: int, seed: int = 0, *, start: int = 1, prefix: str = "M"
) -> Iterator[tuple[str, str, dict[str, Any]]]:
    """Yield ``n`` (kind, field, case) triples: a valid case broken in one declared way.

    ``kind`` is one of MALFORMED_KINDS (cycled in order), ``field`` the key that was broken.
    A consumer must report each of them with the field named; it must never drop one.
    """
    rng = random.Random(seed ^ 0x5EED)
    base = generate_labelled(n, seed ^ 0xBAD, start=start)
    for j, (_, case) in enumerate(base):
        kind = MALFORMED_KINDS[j % len(MALFORMED_KINDS)]
        key, bad = rng.choice(_MALFORMATIONS[kind])
        case["case_id"] = f"{prefix}{start + j:06d}"
        case[key] = bad
        yield kind, key, case


def generate_corpus(
    n: int, seed: int = 0, *, mix: str = "hospital", malformed_share: float = 0.001
) -> Iterator[tuple[str | None, str | None, dict[str, Any]]]:
    """Yield ``n`` rows (kind, field, case) with ids D000001.. in order; about
    ``malformed_share`` of them are malformed (kind and field set), the rest valid (None, None).
    """
    picker = random.Random(seed ^ 0xC0FFEE)
    bad = malformed_cases(n, seed, prefix="D")
    for scenario, case in generate_labelled(n, seed, mix=mix):
        if picker.random() < malformed_share:
            kind, key, broken = next(bad)
            broken["case_id"] = case["case_id"]
            broken["context"] = case["context"]
            yield kind, key, broken
        else:
            yield None, None, case


# ----------------------------------------------------------------------------- drawing
def _cumulative(weights: dict[str, float]) -> tuple[tuple[float, str], ...]:
    total, acc, out = sum(weights.values()), 0.0, []
    for name, w in weights.items():
        acc += w / total
        out.append((acc, name))
    return tuple(out)


def _pick(rng: random.Random, table: tuple[tuple[float, str], ...]) -> str:
    r = rng.random()
    for edge, name in table:
        if r < edge:
            return name
    return table[-1][1]


def _index(r: float, weights: tuple[float, ...]) -> int:
    for i, w in enumerate(weights):
        if r < w:
            return i
        r -= w
    return len(weights) - 1


def _normal(u: Any, mean: float, sd: float) -> float:
    """Bounded bell-shaped draw (triangular, mean +/- 2.45 sd): cheaper than gauss, no wild
    tails. Synthesis only."""
    return mean + (u() + u() - 1.0) * 2.449 * sd


def _below(u: Any, lo: int, hi: int | None = None) -> int:
    """Integer in [lo, hi) (or [0, lo)) from one uniform draw; deterministic and fast."""
    if hi is None:
        lo, hi = 0, lo
    return lo + int(u() * (hi - lo))


def _clamp(x: float, lo: float, hi: float) -> float:
    return lo if x < lo else hi if x > hi else x


def _quantity(name: str, mmhg: float, kpa: bool) -> tuple[Any, float]:
    """Reported form of a pressure and the mmHg value a reader recovers from it."""
    if kpa:
        v = round(mmhg / 7.50062, 2)
        return {"value": v, "unit": "kPa"}, v * 7.50062
    v = round(mmhg, 1)
    return v, v


def _acid_base(
    rng: random.Random, resp: str, chronic: bool, metabolic: tuple[str, ...]
) -> tuple[float, float, float, str]:
    """(HCO3, PCO2 mmHg, gap excess, high-gap kind) before rounding. Synthesis only."""
    u = rng.random
    hco3 = 24.0 + _normal(u, 0.0, 0.6)
    gap_excess, kind = 0.0, ""
    if HAGMA in metabolic:
        gap_excess = 6.0 + 16.0 * u()
        hco3 -= gap_excess / (0.9 + 0.8 * u())
        r = u()
        kind = "lactic" if r < 0.55 else "keto" if r < 0.85 else "renal"
    if NAGMA in metabolic:
        hco3 -= 4.0 + 6.0 * u()
    if MALK in metabolic:
        hco3 += 6.0 + 12.0 * u()
    hco3 = max(hco3, 4.0)
    if hco3 < 22.5:
        pco2 = 1.5 * hco3 + 8.0 + 3.0 * u() - 1.5
    elif hco3 > 25.5:
        pco2 = 40.0 + 0.7 * (hco3 - 24.0) + 3.0 * u() - 1.5
    else:
        pco2 = 40.0 + _normal(u, 0.0, 1.2)
    if resp == "respiratory_acidosis":
        dp = 12.0 + (23.0 if chronic else 33.0) * u()
        pco2 += dp
        hco3 += (0.35 if chronic else 0.1) * dp
    elif resp == "respiratory_alkalosis":
        room = pco2 - 13.0
        dp = min(room, 7.0 + 13.0 * u())
        pco2 -= dp
        hco3 -= (0.4 if chronic else 0.2) * dp
    return _clamp(hco3, 3.5, 50.0), _clamp(pco2, 12.0, 110.0), gap_excess, kind


def _draw(rng: random.Random, case_id: str, ctx: dict[str, str]) -> tuple[Scenario, dict[str, Any]]:
    u = rng.random
    ward = ctx["ward"]
    venous_share, vent_share, fio2_share = _WARDS[ward][1:]
    r = u()
    out_of_scope = "child" if r < _SHARE_CHILD else "pregnant" if r < _SHARE_CHILD + _SHARE_PREGNANT else None
    resp = RESPIRATORY[_index(u(), _RESP_WEIGHTS)]
    metabolic = METABOLIC_SETS[_index(u(), _METABOLIC_WEIGHTS)]
    chronic = u() < 0.5
    if out_of_scope == "pregnant":
        resp, metabolic, chronic = "none", (), True
    venous = u() < venous_share
    ventilated = u() < vent_share
    kpa = u() < _SHARE_KPA
    electrolytes = u() >= _SHARE_NO_ELECTROLYTES
    has_albumin = electrolytes and u() >= _SHARE_NO_ALBUMIN

    for _ in range(8):  # redraw the rare combinations whose pH leaves 6.75-7.75
        if out_of_scope == "pregnant":
            hco3, pco2, gap_excess, kind = 19.0 + 2.5 * u(), 28.0 + 4.0 * u(), 0.0, ""
        else:
            hco3, pco2, gap_excess, kind = _acid_base(rng, resp, chronic, metabolic)
        if venous:
            pco2 += 3.0 + 5.0 * u()
            hco3 += 0.5 + u()
        hco3 = round(hco3, 1)
        pco2_out, pco2_mm = _quantity("pco2", pco2, kpa)
        ph_exact = hh_ph(hco3, pco2_mm)
        if 6.75 <= ph_exact <= 7.75:
            break
    ph = round(ph_exact + _PH_NOISE * (2.0 * u() - 1.0), 2)

    v: dict[str, Any] = {
        "case_id": case_id,
        "context": ctx,
        "sample_type": "venous" if venous else "arterial",
    }
    if resp != "none" and u() < 0.6:
        v["chronicity"] = ("chronic" if chronic else "acute") if u() < 0.85 else "unknown"
    v["ph"], v["pco2"], v["hco3"] = ph, pco2_out, hco3

    age = (
        _below(u, 1, 18)
        if out_of_scope == "child"
        else _below(u, 19, 43)
        if out_of_scope == "pregnant"
        else _below(u, 18, 96)
    )
    v["age"] = age
    if out_of_scope == "pregnant":
        v["pregnant"] = True
    elif ward == "ED" and u() < 0.1:
        v["pregnant"] = False

    _oxygen(rng, v, ward, venous, ventilated, fio2_share, pco2_mm, kpa)
    if electrolytes:
        _electrolytes(rng, v, ward, hco3, gap_excess, has_albumin, ph)
    _chemistry(rng, v, ward, metabolic, gap_excess, kind, hco3, pco2_mm, ph)

    inconsistent = None
    if u() < _SHARE_INCONSISTENT:
        inconsistent = _make_inconsistent(rng, v, pco2_mm)
    scenario = Scenario(
        ward,
        resp,
        None if resp == "none" else ("chronic" if chronic else "acute"),
        metabolic,
        v["sample_type"],
        electrolytes,
        has_albumin,
        ventilated,
        kpa,
        out_of_scope,
        inconsistent,
    )
    return scenario, v


def _oxygen(
    rng: random.Random,
    v: dict[str, Any],
    ward: str,
    venous: bool,
    ventilated: bool,
    fio2_share: float,
    pco2_mm: float,
    kpa: bool,
) -> None:
    u = rng.random
    fio2 = 0.21
    if ventilated:
        fio2 = round(0.3 + 0.6 * u(), 2)
    elif u() < fio2_share:
        fio2 = 0.21 if u() < 0.5 else round(0.24 + 0.36 * u(), 2)
    else:
        fio2 = -1.0  # not reported (assumed room air)
    if fio2 > 0:
        v["fio2"] = {"value": round(fio2 * 100), "unit": "%"} if u() < _SHARE_FIO2_PERCENT else fio2
    if venous:
        po2 = 25.0 + 25.0 * u()
    else:
        alveolar = max(fio2, 0.21) * 713.0 - pco2_mm * 1.25
        po2 = max(45.0, alveolar - (5.0 + (0.15 + 0.45 * u()) * alveolar * u()))
    v["po2"] = _quantity("po2", po2, kpa)[0]
    if u() < 0.6:
        so2 = (
            0.45 + 0.35 * u()
            if venous  # Severinghaus 1979, eq. 1 for arterial
            else 1.0 / (23400.0 / (po2 * po2 * po2 + 150.0 * po2) + 1.0)
        )
        v["so2"] = {"value": round(so2 * 100), "unit": "%"} if u() < 0.3 else round(min(so2, 1.0), 2)
    if ventilated:
        v["peep"] = 5 + 2 * _below(u, 6)
        v["etco2"] = _quantity("etco2", max(10.0, pco2_mm - 2.0 - 10.0 * u()), kpa)[0]
        v["minute_ventilation"] = round(5.0 + 9.0 * u(), 1)
        v["predicted_body_weight"] = round(50.0 + 35.0 * u(), 1)
    if u() < 0.05:
        v["barometric_pressure"] = round(758.0 + _normal(u, 0.0, 6.0))
    if ward == "ICU" and u() < 0.2:
        v["temperature"] = round(_clamp(_normal(u, 37.2, 0.8), 34.0, 40.5), 1)


def _electrolytes(
    rng: random.Random,
    v: dict[str, Any],
    ward: str,
    hco3: float,
    gap_excess: float,
    has_albumin: bool,
    ph: float,
) -> None:
    u = rng.random
    na = round(_clamp(_normal(u, 139.0, 3.5), 124.0, 156.0))
    mean, sd = _ALBUMIN_BY_WARD[ward]
    albumin = _clamp(_normal(u, mean, sd), 12.0, 52.0)
    gap = 7.0 + 5.0 * u() + gap_excess - 0.25 * (44.0 - albumin)  # Figge 1998 effect
    v["na"] = na
    v["cl"] = round(na - hco3 - gap)
    v["k"] = round(_clamp(_normal(u, 4.2, 0.45) + (0.4 if ph < 7.3 else 0.0), 2.6, 6.8), 1)
    if has_albumin:
        v["albumin"] = (
            {"value": round(albumin / 10.0, 1), "unit": "g/dL"}
            if u() < _SHARE_ALBUMIN_GDL
            else round(albumin)
        )


def _chemistry(
    rng: random.Random,
    v: dict[str, Any],
    ward: str,
    metabolic: tuple[str, ...],
    gap_excess: float,
    kind: str,
    hco3: float,
    pco2_mm: float,
    ph: float,
) -> None:
    u = rng.random
    if u() < 0.7 or kind == "lactic":
        v["lactate"] = round(1.0 + gap_excess * (0.6 + 0.4 * u()) if kind == "lactic" else 0.6 + 1.3 * u(), 1)
    renal = kind == "renal"
    toxic = kind != "" and ward == "ED" and u() < 0.1
    osm = toxic or (ward == "ED" and u() < 0.08)
    glucose = urea = 0.0
    if osm or kind == "keto" or u() < 0.6:
        glucose = 18.0 + 17.0 * u() if kind == "keto" else 5.0 + 3.0 * (u() + u())
        v["glucose"] = (
            {"value": round(glucose / 0.0555062), "unit": "mg/dL"} if u() < 0.1 else round(glucose, 1)
        )
    if osm or renal or u() < 0.5:
        urea = 25.0 + 20.0 * u() if renal else 2.5 + 4.0 * (u() + u())
        v["urea"] = round(urea, 1)
        v["creatinine"] = round(400.0 + 500.0 * u() if renal else 50.0 + 45.0 * (u() + u()))
    if osm and "na" in v:
        calc = 2.0 * v["na"] + glucose + urea
        v["osmolality"] = round(calc + (25.0 + 35.0 * u() if toxic else -4.0 + 12.0 * u()))
    if ward == "ED" and u() < 0.05:
        v["ethanol"] = round(5.0 + 55.0 * u(), 1)
    if u() < 0.6:
        v["hb"] = round(_clamp(_normal(u, 12.5, 2.0), 6.0, 18.0), 1)
    if u() < 0.6:  # analyser SBE, Van Slyke form (siggaard1977)
        v["base_excess"] = round(0.93 * (hco3 - 24.4 + 14.83 * (ph - 7.40)), 1) + 0.0
    if u() < 0.15:
        v["tco2"] = round(hco3 + min(0.03 * pco2_mm, 1.5) + 0.6 * u() - 0.3, 1)
    if ward == "ICU" and u() < 0.3:
        v["phosphate"] = round(_clamp(_normal(u, 1.1, 0.3), 0.3, 3.0), 2)
        v["ionized_calcium"] = round(_clamp(_normal(u, 1.15, 0.07), 0.8, 1.5), 2)
        v["magnesium"] = round(_clamp(_normal(u, 0.85, 0.12), 0.4, 1.6), 2)
    if (NAGMA in metabolic or MALK in metabolic) and u() < 0.3:
        v["urine_na"] = round(10.0 + 80.0 * u())
        v["urine_k"] = round(10.0 + 50.0 * u())
        v["urine_cl"] = round(5.0 + 90.0 * u())


def _make_inconsistent(rng: random.Random, v: dict[str, Any], pco2_mm: float) -> str:
    """Apply a transcription-like error so pH is >= 0.08 away from Henderson-Hasselbalch
    (well beyond a 0.03 pH or a 10 % [H+] consistency tolerance)."""
    ph, hco3 = v["ph"], v["hco3"]
    expected = hh_ph(hco3, pco2_mm)
    mode = rng.choice(("ph_digits_swapped", "ph_slip", "hco3_from_other_sample"))
    if mode == "ph_digits_swapped":
        digits = f"{ph:.2f}"
        swapped = float(digits[:-2] + digits[-1] + digits[-2])
        if abs(swapped - expected) >= 0.08 and 6.6 <= swapped <= 7.9:
            v["ph"] = swapped
            return mode
        mode = "ph_slip"
    if mode == "ph_slip":
        step = 0.12 + 0.13 * rng.random()
        v["ph"] = round(ph - step if ph > 7.3 else ph + step, 2)
        return mode
    factor = 1.5 + rng.random() if hco3 < 25 else 1.0 / (1.5 + rng.random())
    v["hco3"] = round(hco3 * factor, 1)
    return mode

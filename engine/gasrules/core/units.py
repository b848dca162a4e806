"""Units: the UCUM codes a case may use, the spellings people type for them, and labels.

The rulebook says which units each input accepts and how to convert them (it holds the
factors); this module only normalises spellings to UCUM codes and names them for display.
"""

from __future__ import annotations

# UCUM codes the engine knows by name (an input accepts those its rulebook lists).
UCUM_CODES = (
    "mm[Hg]",
    "kPa",
    "mmol/L",
    "meq/L",
    "g/dL",
    "g/L",
    "mg/dL",
    "umol/L",
    "mosm/kg",
    "[pH]",
    "1",
    "%",
    "Cel",
    "[degF]",
    "a",
    "L/min",
    "kg",
    "cm[H2O]",
    "nmol/L",
    "mL/dL",
    "L/min/kg",
    "mL/kg",
    "mg/L",
)

# Common spellings -> UCUM code. Keys are compared after lower-casing and removing spaces.
_ALIASES = {
    "mmhg": "mm[Hg]",
    "mm[hg]": "mm[Hg]",
    "torr": "mm[Hg]",
    "kpa": "kPa",
    "mmol/l": "mmol/L",
    "mm/l": "mmol/L",
    "mmol": "mmol/L",
    "meq/l": "meq/L",
    "meq/liter": "meq/L",
    "g/dl": "g/dL",
    "g/l": "g/L",
    "mg/dl": "mg/dL",
    "mg/l": "mg/L",
    "umol/l": "umol/L",
    "µmol/l": "umol/L",
    "μmol/l": "umol/L",
    "micromol/l": "umol/L",
    "mosm/kg": "mosm/kg",
    "mosm/kgh2o": "mosm/kg",
    "mosmol/kg": "mosm/kg",
    "mosm/kg[h2o]": "mosm/kg",
    "[ph]": "[pH]",
    "ph": "[pH]",
    "1": "1",
    "fraction": "1",
    "{ratio}": "1",
    "ratio": "1",
    "%": "%",
    "percent": "%",
    "cel": "Cel",
    "°c": "Cel",
    "degc": "Cel",
    "c": "Cel",
    "celsius": "Cel",
    "[degf]": "[degF]",
    "°f": "[degF]",
    "degf": "[degF]",
    "f": "[degF]",
    "a": "a",
    "y": "a",
    "yr": "a",
    "years": "a",
    "year": "a",
    "l/min": "L/min",
    "lpm": "L/min",
    "kg": "kg",
    "cm[h2o]": "cm[H2O]",
    "cmh2o": "cm[H2O]",
    "nmol/l": "nmol/L",
    "ml/dl": "mL/dL",
    "l/min/kg": "L/min/kg",
    "ml/kg": "mL/kg",
}

_LABELS = {
    "mm[Hg]": "mmHg",
    "meq/L": "mEq/L",
    "mosm/kg": "mOsm/kg",
    "[pH]": "",
    "1": "",
    "Cel": "°C",
    "[degF]": "°F",
    "a": "years",
    "cm[H2O]": "cmH2O",
    "umol/L": "µmol/L",
}


def normalise(unit: str) -> str | None:
    """The UCUM code for a unit as typed, or None when it is not known."""
    if unit in UCUM_CODES:
        return unit
    key = unit.strip().replace(" ", "").lower()
    return _ALIASES.get(key)


def label(unit: str) -> str:
    """How a unit is shown to a reader (mm[Hg] -> mmHg; [pH] and 1 -> nothing)."""
    return _LABELS.get(unit, unit)

"""Conversion factors between conventional and SI units for common clinical measurements.

The factor ``f`` of a :class:`Conversion` turns a value in the conventional
unit into the SI (or other target) unit: ``si = conventional * f``. For
concentrations the factor is derived from the molar mass (``f = 10 * k / M``
for mg/dL to mmol/L, with ``k = 1000`` for umol/L), so that the table can be
checked both against the published rounded factors and against chemistry.
Temperature is affine (``C = (F - 32) * 5/9``) and is handled separately.

Sources
-------
Factors follow the SI conversion table of the American Medical Association
(AMA Manual of Style, "Units of Measure", SI conversion table; also printed
in JAMA's instructions for authors) and Young DS, "Implementation of SI
units for clinical laboratory data. Style specifications and conversion
tables", Ann Intern Med 1987;106:114-129. Molar masses from the IUPAC
standard atomic weights. Length and mass: the international yard and pound
(1959): 1 in = 2.54 cm and 1 lb = 0.45359237 kg exactly.

Name aliases are the authors' list of common column spellings (common
practice, no source).
"""
from __future__ import annotations

import re
from dataclasses import dataclass
from typing import Dict, List, Optional, Tuple


@dataclass(frozen=True)
class Conversion:
    """One multiplicative unit conversion: ``to_value = from_value * factor``.

    Attributes
    ----------
    analyte : str
    from_unit, to_unit : str
        ``from_unit`` is the conventional unit, ``to_unit`` the SI (or other) unit.
    factor : float
    molar_mass : float or None
        g/mol, when the factor derives from it.
    aliases : tuple of str
        Normalised column-name spellings (lower case, ``_`` separated).
    source : str
    """

    analyte: str
    from_unit: str
    to_unit: str
    factor: float
    molar_mass: Optional[float] = None
    aliases: Tuple[str, ...] = ()
    source: str = ""

    def to_dict(self) -> dict:
        d = {"analyte": self.analyte, "from_unit": self.from_unit, "to_unit": self.to_unit,
             "factor": float(self.factor), "source": self.source}
        if self.molar_mass is not None:
            d["molar_mass"] = float(self.molar_mass)
        return d


@dataclass(frozen=True)
class AffineConversion:
    """An affine conversion: ``to_value = (from_value + offset) * factor``."""

    analyte: str
    from_unit: str
    to_unit: str
    factor: float
    offset: float
    aliases: Tuple[str, ...] = ()
    source: str = ""

    def forward(self, x):
        return (x + self.offset) * self.factor

    def backward(self, y):
        return y / self.factor - self.offset

    def to_dict(self) -> dict:
        return {"analyte": self.analyte, "from_unit": self.from_unit, "to_unit": self.to_unit,
                "factor": float(self.factor), "offset": float(self.offset), "source": self.source}


_AMA = "AMA Manual of Style SI conversion table; Young, Ann Intern Med 1987;106:114-129"
_EXACT = "international yard and pound (1959), exact"


def _molar(analyte, mm, to_unit, aliases, *, from_unit="mg/dL"):
    # mg/dL -> mmol/L: 1 mg/dL = 10 mg/L = 10 / M mmol/L; -> umol/L: x 1000
    k = {"mmol/L": 1.0, "umol/L": 1000.0}[to_unit]
    if from_unit == "ug/dL":
        k /= 1000.0
    return Conversion(analyte, from_unit, to_unit, 10.0 * k / mm, mm, tuple(aliases), _AMA)


#: The conversion table. Extend by adding rows; aliases are normalised names.
CONVERSIONS: Tuple[Conversion, ...] = (
    _molar("creatinine", 113.12, "umol/L", ("creatinine", "creat", "crea", "cr", "scr", "serum_creatinine")),
    _molar("glucose", 180.16, "mmol/L", ("glucose", "glu", "gluc", "blood_glucose", "bg", "plasma_glucose")),
    _molar("urea", 60.06, "mmol/L", ("urea", "serum_urea")),
    # urea nitrogen: 2 N per urea (2 x 14.007 = 28.014 g/mol), reported as mmol/L of urea
    _molar("urea nitrogen (BUN)", 28.014, "mmol/L", ("bun", "urea_nitrogen", "blood_urea_nitrogen")),
    _molar("cholesterol", 386.65, "mmol/L", ("cholesterol", "chol", "total_cholesterol", "tc", "hdl", "ldl",
                                             "hdl_c", "ldl_c", "hdl_cholesterol", "ldl_cholesterol")),
    # triglycerides expressed as triolein
    _molar("triglycerides", 885.7, "mmol/L", ("triglycerides", "triglyceride", "trig", "trigs", "tg")),
    _molar("bilirubin", 584.66, "umol/L", ("bilirubin", "bili", "tbil", "total_bilirubin", "tbili")),
    _molar("calcium", 40.078, "mmol/L", ("calcium", "ca", "serum_calcium", "total_calcium")),
    _molar("magnesium", 24.305, "mmol/L", ("magnesium", "mg", "serum_magnesium")),
    _molar("phosphate (as phosphorus)", 30.974, "mmol/L", ("phosphate", "phosphorus", "phos", "po4")),
    _molar("uric acid", 168.11, "umol/L", ("uric_acid", "urate", "ua")),
    _molar("lactate", 90.08, "mmol/L", ("lactate", "lactic_acid", "lac")),
    _molar("iron", 55.845, "umol/L", ("iron", "fe", "serum_iron"), from_unit="ug/dL"),
    # haemoglobin monomer (one haem subunit), 16 114.5 g/mol
    Conversion("haemoglobin", "g/dL", "mmol/L", 10.0 / 16.1145, 16114.5,
               ("haemoglobin", "hemoglobin", "hb", "hgb"), _AMA),
    Conversion("haemoglobin", "g/dL", "g/L", 10.0, None, ("haemoglobin", "hemoglobin", "hb", "hgb"), _AMA),
    Conversion("albumin", "g/dL", "g/L", 10.0, None, ("albumin", "alb", "serum_albumin"), _AMA),
    Conversion("total protein", "g/dL", "g/L", 10.0, None, ("total_protein", "protein", "tp"), _AMA),
    Conversion("C-reactive protein", "mg/dL", "mg/L", 10.0, None, ("crp", "c_reactive_protein", "hs_crp", "hscrp"), _AMA),
    Conversion("troponin", "ng/mL", "ng/L", 1000.0, None, ("troponin", "trop", "tni", "tnt", "ctni", "ctnt",
                                                           "hs_troponin", "troponin_i", "troponin_t"), _AMA),
    Conversion("blood gas pressure", "mmHg", "kPa", 0.133322, None, ("pao2", "paco2", "po2", "pco2"), _AMA),
    Conversion("weight", "lb", "kg", 0.45359237, None, ("weight", "wt", "body_weight", "mass", "body_mass"), _EXACT),
    Conversion("height", "in", "cm", 2.54, None, ("height", "ht", "stature", "length", "body_height"), _EXACT),
)

#: Fahrenheit to Celsius: C = (F - 32) * 5/9 (definition of the two scales).
TEMPERATURE = AffineConversion("temperature", "degF", "degC", 5.0 / 9.0, -32.0,
                               ("temperature", "temp", "body_temperature", "body_temp", "core_temp",
                                "tympanic_temp", "oral_temp"),
                               "definition of the Celsius and Fahrenheit scales")

#: Generic decimal prefix changes (g/dL vs g/L, mg/dL vs mg/L, ng/mL vs ng/L), any feature.
PREFIX_FACTORS: Tuple[float, ...] = (10.0, 100.0, 1000.0)

_UNIT_SUFFIX = re.compile(r"_(mg_?dl|mmol_?l?|umol_?l?|g_?dl|g_?l|mg_?l|ng_?ml|ng_?l|kg|lb|lbs|cm|in|"
                          r"deg_?c|deg_?f|c|f|si|conv|serum|plasma|value|result|level)$")


def normalise_name(name: str) -> str:
    """Lower-case, ``_``-separated form of a column name."""
    s = re.sub(r"([a-z0-9])([A-Z][a-z])", r"\1_\2", str(name))
    return re.sub(r"[^0-9a-zA-Z]+", "_", s).strip("_").lower()


def _name_forms(name: str) -> List[str]:
    norm = normalise_name(name)
    forms = [norm]
    stripped = norm
    for _ in range(3):
        new = _UNIT_SUFFIX.sub("", stripped)
        if new == stripped or not new:
            break
        stripped = new
        forms.append(stripped)
    return forms


def _matches(name: str, aliases: Tuple[str, ...]) -> bool:
    for form in _name_forms(name):
        tokens = form.split("_")
        for alias in aliases:
            if form == alias:
                return True
            a = alias.split("_")
            if len(alias) >= 4 or len(a) > 1:
                for i in range(len(tokens) - len(a) + 1):
                    if tokens[i:i + len(a)] == a:
                        return True
    return False


def conversions_for(name: str) -> List[Conversion]:
    """The multiplicative conversions whose aliases match a column name.

    >>> [c.to_unit for c in conversions_for("Creatinine_umol_L")]
    ['umol/L']
    """
    return [c for c in CONVERSIONS if _matches(name, c.aliases)]


def is_temperature(name: str) -> bool:
    """Whether a column name denotes a body temperature."""
    return _matches(name, TEMPERATURE.aliases)


def candidate_factors(name: Optional[str] = None) -> List[Tuple[float, str, Optional[Conversion]]]:
    """(factor, label, conversion) candidates for a ratio of two sites' values.

    With a name, the analyte's own conversions; without (or for no match),
    every distinct factor of the table and the decimal prefixes.
    """
    out: List[Tuple[float, str, Optional[Conversion]]] = []
    if name is not None:
        for c in conversions_for(name):
            out.append((c.factor, f"{c.analyte}: {c.from_unit} -> {c.to_unit}", c))
        if out:
            return out
    seen: Dict[float, bool] = {}
    for c in CONVERSIONS:
        key = round(c.factor, 6)
        if key in seen:
            continue
        seen[key] = True
        out.append((c.factor, f"{c.analyte}: {c.from_unit} -> {c.to_unit}", c))
    for p in PREFIX_FACTORS:
        if round(p, 6) not in seen:
            out.append((p, f"decimal prefix x{p:g}", None))
    return out


def convert(value, analyte: str, from_unit: str, to_unit: str):
    """Convert a value (scalar or array) between two units of the table.

    Raises
    ------
    KeyError
        When the table has no such conversion.
    """
    if analyte == "temperature":
        if (from_unit, to_unit) == ("degF", "degC"):
            return TEMPERATURE.forward(value)
        if (from_unit, to_unit) == ("degC", "degF"):
            return TEMPERATURE.backward(value)
    for c in CONVERSIONS:
        if c.analyte == analyte:
            if (c.from_unit, c.to_unit) == (from_unit, to_unit):
                return value * c.factor
            if (c.to_unit, c.from_unit) == (from_unit, to_unit):
                return value / c.factor
    raise KeyError(f"no conversion for {analyte!r} from {from_unit!r} to {to_unit!r}")


# ---------------------------------------------------------------------------
# unit labels written in cells or in a column of their own
# ---------------------------------------------------------------------------

#: Metric prefixes (SI brochure, BIPM, 9th edition, 2019).
_PREFIX = {"": 1.0, "d": 1e-1, "c": 1e-2, "m": 1e-3, "u": 1e-6, "n": 1e-9, "p": 1e-12, "f": 1e-15, "k": 1e3}
_BASES = ("mol", "g", "eq", "iu", "u", "kat")
_UNIT_PARTS = re.compile(r"^(?P<pm>[dcmunpfk]?)(?P<base>mol|g|eq|iu|u|kat)/(?P<pv>[dcmunpf]?)l$")
_DISPLAY = {"mg/dl": "mg/dL", "g/dl": "g/dL", "ug/dl": "ug/dL", "ng/ml": "ng/mL", "pg/ml": "pg/mL",
            "mmhg": "mmHg", "kpa": "kPa", "degc": "degC", "degf": "degF", "iu/l": "IU/L", "u/l": "U/L"}
_OTHER_UNITS = {"mmhg", "kpa", "kg", "lb", "cm", "in", "degc", "degf", "%", "mm", "m", "g", "bpm", "/min", "fl",
                "pg", "s"}


def canonical_unit(text) -> Optional[str]:
    """The canonical spelling of a unit label, or None when ``text`` is not one.

    Case, spaces, the micro sign (µ, μ, mc) and litre spellings are normalised:
    ``"µmol/l"``, ``"umol/L"`` and ``"micromol/L"`` all give ``"umol/L"``.

    >>> canonical_unit(" µmol/l "), canonical_unit("MG/DL"), canonical_unit("ward 3")
    ('umol/L', 'mg/dL', None)
    """
    if text is None:
        return None
    s = str(text).strip().lower().replace(" ", "")
    if not s:
        return None
    s = s.replace("\u00b5", "u").replace("\u03bc", "u").replace("micro", "u").replace("mcg", "ug")
    s = s.replace("mcmol", "umol").replace("litre", "l").replace("liter", "l").replace("\u00b0", "deg")
    s = {"lbs": "lb", "deg.c": "degc", "deg.f": "degf", "c": "degc", "f": "degf"}.get(s, s)
    m = _UNIT_PARTS.match(s)
    if m:
        key = f"{m['pm']}{m['base']}/{m['pv']}l"
        if key in _DISPLAY:
            return _DISPLAY[key]
        return f"{m['pm']}{m['base']}/{m['pv']}L"
    if s in _OTHER_UNITS:
        return _DISPLAY.get(s, s)
    return None


def _parts(unit: str):
    m = _UNIT_PARTS.match(unit.lower())
    if not m:
        return None
    return _PREFIX[m["pm"]], m["base"], _PREFIX[m["pv"]]


def unit_factor(from_unit: str, to_unit: str, name: Optional[str] = None) -> Optional[Tuple[float, str]]:
    """The factor ``f`` with ``value_in_to_unit = value_in_from_unit * f``, and its source.

    The analyte's row of :data:`CONVERSIONS` (matched by the column ``name``) when it
    converts between the two units; otherwise metric prefixes alone when both are
    ``amount/volume`` of the same base (``mg/dL`` -> ``mg/L`` = 10); else None (for
    instance ``mg/dL`` -> ``mmol/L`` without an analyte, which needs a molar mass).

    >>> unit_factor("mg/dL", "umol/L", "creatinine")[0]  # doctest: +ELLIPSIS
    88.4...
    >>> unit_factor("g/dL", "g/L")
    (10.0, 'metric prefixes')
    """
    a, b = canonical_unit(from_unit), canonical_unit(to_unit)
    if a is None or b is None or a == b:
        return None
    if name is not None:
        for c in conversions_for(name):
            cf, ct = canonical_unit(c.from_unit), canonical_unit(c.to_unit)
            if (cf, ct) == (a, b):
                return float(c.factor), c.source
            if (cf, ct) == (b, a):
                return 1.0 / float(c.factor), c.source
    pa_, pb = _parts(a), _parts(b)
    if pa_ and pb and pa_[1] == pb[1]:
        # amount per volume: x [pm base / pv L] = x * pm / pv  [base / L]
        return (pa_[0] / pa_[2]) / (pb[0] / pb[2]), "metric prefixes"
    return None


def unit_column_base(name: str) -> Optional[str]:
    """The name of the measurement a unit column qualifies, from its own name
    (``creat_unit`` -> ``creat``, ``units_glucose`` -> ``glucose``), or None."""
    norm = normalise_name(name)
    for pat in (r"^(.+?)_(units?|uom|unit_of_measure)$", r"^(units?|uom)_(.+)$"):
        m = re.match(pat, norm)
        if m:
            return m.group(1) if not m.group(1).startswith(("unit", "uom")) else m.group(2)
    return None


def names_refer_to_same(a: str, b: str) -> bool:
    """Whether two column names denote the same measurement: equal after
    normalising, one a prefix of the other at a word or 4-letter boundary, or both
    matching one analyte of :data:`CONVERSIONS`."""
    na, nb = normalise_name(a), normalise_name(b)
    if na == nb:
        return True
    short, long_ = sorted((na, nb), key=len)
    if len(short) >= 4 and long_.startswith(short):
        return True
    ca = {c.analyte for c in conversions_for(na)}
    cb = {c.analyte for c in conversions_for(nb)}
    return bool(ca & cb)

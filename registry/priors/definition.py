"""Prior definition files (TOML): what a curator writes once and keeps under version control.

Layout (every key but `name`, `parameter` and `select.quantity` is optional):

    name = "falls-control-rate"            # letters, digits, - and _
    parameter = "Control-arm 12-month fall rate in the planned trial"
    target = "predictive"                  # predictive (a new study's parameter) | mean

    [select]
    quantity = "falls-rate-control-12m"
    measure = "rate"
    tags = ["community"]                   # entries must have all of these
    exclude_tags = ["care-home"]
    sources = ["inv-aldren2016"]           # only these sources
    include = [21]                         # these entry ids too, whatever the filters
    exclude = [7]
    include_retracted = false              # entries of retracted sources: left out unless true
    [select.studies]                       # which entry stands for a study reported twice
    "INV-TRIAL-ALDREN" = 2

    [pool]
    method = "bayes"                       # common, dl, pm, reml, ml, bayes
    likelihood = "exact"                   # normal | exact (count likelihood, bayes only)
    tau_prior = "half-normal:0.5"          # default on log and logit scales only; elsewhere
                                           # give it in the outcome's units or K*unit_sd
    mu_prior = "flat"

    [discount]
    mechanism = "both"                     # power | bias | both | none
    global_power = 1.0                     # a power weight on every entry
    robust_weight = 0.2                    # weight of a vague component (Schmidli et al.)
    robust_component = "auto"              # or FAMILY:PARAMS, e.g. "beta:1,1" (see README)
    ess_cap = 100                          # met by solving for the global power weight
    [discount.mapping.population.serious]  # change the default mapping where you disagree
    power = 0.5

    [[rule]]                               # ratings: later rules win, overrides win last
    name = "care homes"
    where = { tags = ["care-home"] }       # tags (all), or entry fields: design, setting, ...
    population = { level = "serious", why = "care-home residents fall more often" }

    [override.12]                          # ratings for one entry id
    intervention = { level = "minor", why = "per-protocol analysis" }

    [output]
    family = "auto"       # auto, normal, student_t, mixture, beta, gamma or lognormal
    ess_unit = "person-years"
    unit_sd = 2.0                          # sd of one unit's observation on the analysis scale
    max_components = 4                     # most components a mixture approximation may have
    plausible = [0.3, 2.5]                 # a range on the natural scale, for a check

Errors name the key and its line: `FILE, line N, 'discount.robust_weight': must be ...`.
"""

from __future__ import annotations

import json
import math
import re
import tomllib
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from registry.errors import InputError
from registry.evidence.reading import read_text
from registry.evidence.sheets import CONTEXT_FIELDS
from registry.priors.ratings import DOMAINS, DiscountMapping, levels_for
from registry.storage.location import MAX_ID

NAME = re.compile(r"[a-z0-9][a-z0-9_-]*")
METHODS = ("common", "dl", "pm", "reml", "ml", "bayes")
FAMILIES = ("auto", "normal", "student_t", "mixture", "beta", "gamma", "lognormal")
MECHANISMS = ("power", "bias", "both", "none")
TARGETS = ("predictive", "mean")
WHERE_FIELDS = ("tags", "source", "study", "measure", *CONTEXT_FIELDS)


@dataclass(frozen=True)
class Setting:
    """One key of the file: its default, and a check that says what it must be."""

    default: Any
    check: Callable[[Any], bool]
    must: str


def _text(v: Any) -> bool:
    return isinstance(v, str) and bool(v.strip())


def _number(lo: float, hi: float, *, open_lo: bool = False) -> Callable[[Any], bool]:
    def check(v: Any) -> bool:
        ok = isinstance(v, int | float) and not isinstance(v, bool) and math.isfinite(v)
        return ok and (lo < v if open_lo else lo <= v) and v <= hi

    return check


def _one_of(choices: tuple[str, ...]) -> Setting:
    return Setting(choices[0], lambda v: v in choices, f"one of {', '.join(choices)}")


def _strings(v: Any) -> bool:
    return isinstance(v, list) and all(_text(x) for x in v)


def _id(x: Any) -> bool:
    """An entry id: a whole number that a database integer can hold."""
    return isinstance(x, int) and not isinstance(x, bool) and 0 < x <= MAX_ID


def _ids(v: Any) -> bool:
    return isinstance(v, list) and all(_id(x) for x in v)


SETTINGS: dict[str, Setting] = {
    "name": Setting(
        None,
        lambda v: isinstance(v, str) and bool(NAME.fullmatch(v)),
        "lowercase letters, digits, - and _",
    ),
    "parameter": Setting(None, _text, "a sentence saying what the parameter is"),
    "target": Setting("predictive", lambda v: v in TARGETS, f"one of {', '.join(TARGETS)}"),
    "select.quantity": Setting(None, _text, "a quantity key"),
    "select.measure": Setting(None, _text, "a measure"),
    "select.tags": Setting([], _strings, "a list of tags"),
    "select.exclude_tags": Setting([], _strings, "a list of tags"),
    "select.sources": Setting([], _strings, "a list of citation keys"),
    "select.include": Setting([], _ids, "a list of entry ids"),
    "select.exclude": Setting([], _ids, "a list of entry ids"),
    "select.include_retracted": Setting(
        False, lambda v: isinstance(v, bool), "true or false (entries of retracted sources)"
    ),
    "select.studies": Setting(
        {},
        lambda v: isinstance(v, dict) and all(_id(x) for x in v.values()),
        "a table of study key = entry id",
    ),
    "pool.method": Setting("bayes", lambda v: v in METHODS, f"one of {', '.join(METHODS)}"),
    "pool.likelihood": Setting(
        "normal", lambda v: v in ("normal", "exact"), "one of normal, exact"
    ),
    "pool.tau_prior": Setting(None, _text, "a tau prior such as half-normal:0.5"),
    "pool.mu_prior": Setting("flat", _text, "flat or normal:MEAN,SD"),
    "discount.mechanism": Setting(
        "both", lambda v: v in MECHANISMS, f"one of {', '.join(MECHANISMS)}"
    ),
    "discount.global_power": Setting(1.0, _number(0, 1, open_lo=True), "a number in (0, 1]"),
    "discount.robust_weight": Setting(0.0, _number(0, 0.99), "a number in [0, 0.99]"),
    "discount.robust_component": Setting("auto", _text, "auto or FAMILY:PARAMS such as beta:1,1"),
    "discount.ess_cap": Setting(None, _number(0, float("inf"), open_lo=True), "a positive number"),
    "discount.mapping": Setting({}, lambda v: isinstance(v, dict), "a table of domains"),
    "rule": Setting([], lambda v: isinstance(v, list), "an array of [[rule]] tables"),
    "override": Setting({}, lambda v: isinstance(v, dict), "tables [override.ID]"),
    "output.family": Setting("auto", lambda v: v in FAMILIES, f"one of {', '.join(FAMILIES)}"),
    "output.ess_unit": Setting(None, _text, "a unit such as participants"),
    "output.unit_sd": Setting(None, _number(0, float("inf"), open_lo=True), "a positive number"),
    "output.max_components": Setting(
        4,
        lambda v: isinstance(v, int) and not isinstance(v, bool) and 1 <= v <= 10,
        "a whole number from 1 to 10",
    ),
    "output.plausible": Setting(
        None,
        lambda v: (
            isinstance(v, list)
            and len(v) == 2
            and all(isinstance(x, int | float) and math.isfinite(x) for x in v)
            and v[0] < v[1]
        ),
        "[low, high], finite numbers with low < high",
    ),
}
REQUIRED = ("name", "parameter", "select.quantity")
TABLES = ("select", "pool", "discount", "output")


def _line_of(text: str, key: str) -> int | None:
    """The line where a dotted key is set (first match of its last part after its table)."""
    parts = key.split(".")
    table, leaf = ".".join(parts[:-1]), parts[-1]
    current = ""
    for number, line in enumerate(text.splitlines(), start=1):
        header = re.match(r"\s*\[\[?\s*([^\]]+?)\s*\]\]?", line)
        if header:
            current = header.group(1).strip()
            if current == key or (current.startswith(key + ".") and not table):
                return number
            continue
        if re.match(rf"\s*\"?{re.escape(leaf)}\"?\s*=", line) and (
            current == table or (not table and not current) or current.startswith(table)
        ):
            return number
    return None


@dataclass(frozen=True)
class Definition:
    """A validated definition: every setting resolved, in canonical (sorted) form."""

    values: Mapping[str, Any]
    path: str = ""

    def __getitem__(self, key: str) -> Any:
        return self.values[key]

    @property
    def name(self) -> str:
        return self.values["name"]

    def canonical(self) -> dict[str, Any]:
        """Plain data with sorted keys: what the digest and the registry store."""
        return json.loads(json.dumps(dict(self.values), sort_keys=True))

    def mapping(self) -> DiscountMapping:
        return DiscountMapping.from_dict(self.values["discount.mapping"])


def _flatten(doc: Mapping[str, Any]) -> dict[str, Any]:
    flat: dict[str, Any] = {}
    for key, value in doc.items():
        if key in TABLES and isinstance(value, dict):
            for sub, inner in value.items():
                flat[f"{key}.{sub}"] = inner
        else:
            flat[key] = value
    return flat


def _check_rating(value: Any, where: str, domain: str) -> None:
    levels = levels_for(domain)
    if not (isinstance(value, dict) and set(value) <= {"level", "why"} and "level" in value):
        raise InputError('must be { level = ..., why = "..." }', field=where)
    if value["level"] not in levels:
        raise InputError(
            f"level must be one of {', '.join(levels)}, got {value['level']!r}", field=where
        )
    if value["level"] != levels[0] and not _text(value.get("why")):
        raise InputError(
            f"a {domain} rating of {value['level']!r} needs a written why", field=where
        )


def _check_rules(values: dict[str, Any]) -> None:
    for i, rule in enumerate(values["rule"]):
        where = f"rule[{i}]"
        if not isinstance(rule, dict):
            raise InputError("must be a [[rule]] table", field=where)
        for key in rule:
            if key not in ("name", "where", *DOMAINS):
                raise InputError(
                    f"unknown key; a rule has name, where and the domains {', '.join(DOMAINS)}",
                    field=f"{where}.{key}",
                )
        if not _text(rule.get("name")):
            raise InputError(
                "a rule needs a name (it is recorded with each rating it sets)",
                field=f"{where}.name",
            )
        match = rule.get("where", {})
        if not isinstance(match, dict) or not match:
            raise InputError("a rule needs where = { field = value, ... }", field=f"{where}.where")
        for key in match:
            if key not in WHERE_FIELDS:
                raise InputError(
                    f"cannot match on this; use {', '.join(WHERE_FIELDS)}",
                    field=f"{where}.where.{key}",
                )
        for domain in DOMAINS:
            if domain in rule:
                _check_rating(rule[domain], f"{where}.{domain}", domain)
    for entry_id, ratings in values["override"].items():
        where = f"override.{entry_id}"
        if not (entry_id.isdigit() and _id(int(entry_id))) or not isinstance(ratings, dict):
            raise InputError("must be [override.ENTRY_ID] with domain ratings", field=where)
        for domain, rating in ratings.items():
            if domain not in DOMAINS:
                raise InputError(
                    f"unknown domain; one of {', '.join(DOMAINS)}", field=f"{where}.{domain}"
                )
            _check_rating(rating, f"{where}.{domain}", domain)


def parse_definition(text: str, path: str = "<definition>") -> Definition:
    """Validate a definition's text; an unknown key or bad value names the key and line."""
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as error:
        raise InputError(f"not valid TOML: {error}", path=path) from None
    flat = _flatten(doc)

    def fail(key: str, message: str) -> InputError:
        line = _line_of(text, key)
        return InputError(message, field=key, path=f"{path}, line {line}" if line else path)

    for key in flat:
        if key not in SETTINGS:
            raise fail(key, "unknown key; see the layout in the README")
    values: dict[str, Any] = {}
    for key, setting in SETTINGS.items():
        if key not in flat:
            if key in REQUIRED:
                raise InputError("required key is missing", field=key, path=path)
            values[key] = setting.default
            continue
        if not setting.check(flat[key]):
            raise fail(key, f"must be {setting.must}, got {flat[key]!r}")
        values[key] = flat[key]
    if values["pool.likelihood"] == "exact" and values["pool.method"] != "bayes":
        raise fail("pool.likelihood", 'the exact count likelihood needs method = "bayes"')
    try:
        _check_rules(values)
        DiscountMapping.from_dict(values["discount.mapping"])
    except InputError as error:
        key = error.field or ""
        if not key.startswith(("rule", "override")):
            key = f"discount.mapping.{key}" if key else "discount.mapping"
        raise fail(key.split("[")[0], error.message) from None
    return Definition(values, path)


def load_definition(path: str | Path) -> Definition:
    path = Path(path)
    if not path.is_file():
        raise InputError("no such file", path=str(path))
    return parse_definition(read_text(path), str(path))


def definition_from_canonical(doc: Mapping[str, Any]) -> Definition:
    """The stored canonical form back into a Definition (for rebuilding); keys added since it
    was stored take their defaults."""
    values = {key: setting.default for key, setting in SETTINGS.items()}
    values.update(doc)
    return Definition(values, "<stored definition>")

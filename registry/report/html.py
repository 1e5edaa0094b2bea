"""The reviewer's report: one self-contained HTML file per built prior.

Everything a reviewer needs to follow each number from the prior back to the reported cells
and their page: identity, state and a verification rebuilt at report time; the definition;
every entry used (numbers as reported, conversion and its published source, y and se,
citation, DOI, location, extractor, every revision with its reason, ratings with rule and
reason, discount and share); the entries the selection left out and why; figures; the
effective sample size by method; the emitted code.

Self-contained: styles inline, figures as `data:` URIs of SVG, no scripts, nothing fetched.
The only addresses are DOI links (`https://doi.org/...`) in `<a>` elements: documents a
reviewer may open, never resources the page loads. All user text goes through `html.escape`
(`esc`); only this module's own markup is marked `Html`.
"""

from __future__ import annotations

import base64
import html
import json
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import asdict, dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from registry import __version__
from registry.caution import CAUTION
from registry.errors import InputError
from registry.evidence.convert import CONTINUITY_SOURCE, conversion_source
from registry.priors.compare import show
from registry.priors.diff import Summary
from registry.priors.store import Verification, get_prior, trace_prior, verify_prior
from registry.report.figures import ForestRow, discount_forest_svg, predictive_svg, svg_text
from registry.storage.ledger import Ledger
from registry.storage.views import StoredPrior
from registry.values.ess_methods import TABLE as ESS_TABLE
from registry.values.frozen import thaw
from registry.values.measures import MEASURES

STYLE = """
body{font-family:sans-serif;max-width:1100px;margin:1.5em auto;padding:0 1em;color:#111}
h1{font-size:1.5em}h2{border-bottom:1px solid #999;margin-top:1.6em}h3{margin-bottom:.3em}
table{border-collapse:collapse;margin:.4em 0 1em}td,th{border:1px solid #bbb;padding:2px 6px;
text-align:left;vertical-align:top;font-size:.9em}th{background:#eee}
.caution{border:2px solid #b00;background:#fff3f3;padding:.6em 1em}
.stale{color:#b00;font-weight:bold}.ok{color:#060;font-weight:bold}
pre{background:#f4f4f4;padding:.6em;overflow-x:auto;font-size:.85em}
figure{margin:1em 0}img{max-width:100%}.used{font-weight:bold}
"""


NONE_TEXT = "none"


class Html(str):
    """Markup this module wrote itself; anything else is text and is escaped, also when it
    is added to markup."""

    def __add__(self, other: object) -> Html:
        return Html(str.__add__(self, esc(other)))


def esc(value: Any) -> Html:
    if isinstance(value, Html):
        return value
    if value is None:
        return Html("&ndash;")
    if isinstance(value, float):
        return Html(html.escape(f"{value:.6g}"))
    if isinstance(value, list | tuple | Mapping):
        return Html(html.escape(json.dumps(thaw(value), sort_keys=True, ensure_ascii=False)))
    return Html(html.escape(str(value)))


def tag(name: str, *content: Any, **attrs: str) -> Html:
    attributes = "".join(f' {k.rstrip("_")}="{html.escape(v)}"' for k, v in attrs.items())
    return Html(f"<{name}{attributes}>{''.join(esc(c) for c in content)}</{name}>")


def table(headers: Sequence[str], rows: Iterable[Sequence[Any]]) -> Html:
    head = tag("tr", *(tag("th", h) for h in headers))
    body = [tag("tr", *(tag("td", c) for c in row)) for row in rows]
    return tag("table", head, *body)


def pairs(items: Iterable[tuple[str, Any]]) -> Html:
    """A two-column table of labels and values."""
    return tag("table", *(tag("tr", tag("th", k), tag("td", v)) for k, v in items))


def doi_link(doi: str | None) -> Html:
    """A DOI as a link to its document (not a resource the page loads)."""
    if not doi:
        return esc(None)
    return tag("a", f"doi:{doi}", href=f"https://doi.org/{doi}")


def figure(svg: str, caption: Any) -> Html:
    data = base64.b64encode(svg.encode()).decode()
    return tag(
        "figure",
        Html(f'<img alt="{html.escape(str(caption))}" src="data:image/svg+xml;base64,{data}">'),
        tag("figcaption", caption),
    )


@dataclass(frozen=True)
class Written:
    path: Path
    size: int
    verify: str


def _identity(stored: StoredPrior, check: Verification) -> Html:
    p = stored.prior
    verdict = (
        tag("span", "verified: rebuilt with the same digest and components", class_="ok")
        if check.ok
        else tag("span", "does NOT verify", class_="stale")
    )
    state = (
        tag("span", "STALE", class_="stale")
        if stored.stale
        else tag("span", "current", class_="ok")
    )
    return Html(
        tag("h1", f"Prior {p.label}")
        + tag("p", p.parameter)
        + tag("div", CAUTION, class_="caution")
        + pairs(
            [
                ("name, version", p.label),
                ("digest (SHA-256)", p.digest),
                ("built", stored.created_at),
                ("built by", stored.created_by or "not recorded"),
                ("software that built it", f"priorledger {stored.software_version}"),
                ("this report", f"priorledger {__version__}, {datetime.now(UTC).isoformat()}"),
                ("state", state),
                ("verification at report time", verdict),
            ]
        )
        + _listed("Why it is stale", stored.stale)
        + _listed("Differences found by the rebuild", check.differences)
    )


def _listed(title: str, items: Sequence[str]) -> Html:
    if not items:
        return Html("")
    return tag("h3", title) + tag("ul", *(tag("li", x) for x in items))


def _summary(stored: StoredPrior) -> Html:
    s = Summary.of(stored)
    result = stored.result
    rows = [
        ("scale", f"{s.scale} ({stored.prior.measure})"),
        ("target", result.target),
        ("mean, sd", f"{s.mean:.6g}, {s.sd:.6g}"),
        ("central 95% interval", f"[{s.interval_95[0]:.6g}, {s.interval_95[1]:.6g}]"),
        ("global power weight", result.global_power),
    ]
    if result.plausible is not None:
        rows.append(
            (
                "mass in the plausible range",
                f"{result.plausible['mass']:.4f} in {list(result.plausible['range'])}",
            )
        )
    components = table(
        ("weight", "family", "parameters"),
        [
            (f"{c.weight:.6g}", c.family, ", ".join(f"{k} = {v:.6g}" for k, v in c.params.items()))
            for c in stored.prior.components
        ],
    )
    return Html(
        tag("h2", "The prior")
        + pairs(rows)
        + components
        + tag("h3", "Notes of the build")
        + tag("ul", *(tag("li", n) for n in result.notes))
        + tag("h3", "Pooled result")
        + pairs(sorted(result.pooled.items()))
    )


def _ess(stored: StoredPrior) -> Html:
    ess = stored.prior.ess
    notes = ess.get("notes", {})
    rows = [
        (
            m.key,
            m.published_as,
            m.source,
            ess.get(m.key) if ess.get(m.key) is not None else f"none: {notes.get(m.key, '')}",
            ess.get("unit"),
        )
        for m in ESS_TABLE
    ]
    return Html(
        tag("h2", "Effective sample size")
        + table(("method", "published as", "source", "value", "unit"), rows)
        + tag(
            "p", f"One unit of data: {ess.get('unit_source')}; headline method {ess.get('method')}."
        )
    )


def _definition(definition: Any) -> Html:
    flat = {k: v for k, v in definition.items() if k not in ("rule", "override")}
    rules = table(
        ("rule", "where", "ratings it sets (level, why)"),
        [
            (r["name"], r["where"], {k: v for k, v in r.items() if k not in ("name", "where")})
            for r in definition.get("rule", [])
        ],
    )
    overrides = table(
        ("entry", "ratings (level, why)"), sorted(dict(definition.get("override", {})).items())
    )
    return Html(
        tag("h2", "Definition as stored")
        + tag("p", "Every setting, defaults included, as the build read it (canonical form).")
        + table(("setting", "value"), sorted(flat.items()))
        + tag("h3", "Rating rules (later rules win; overrides win last)")
        + rules
        + tag("h3", "Overrides for single entries")
        + overrides
    )


def _entry(e: dict[str, Any]) -> Html:
    source = e["source"]
    context = dict(e["context"])
    conversion = e["conversion"]
    published = conversion_source(conversion) or "no published source recorded for this name"
    corrections = [f"{c} ({CONTINUITY_SOURCE})" for c in e["corrections"]]
    discount = e["discount"]
    return Html(
        tag("h3", f"Entry {e['id']}, revision {e['revision']}", id=f"entry-{e['id']}")
        + pairs(
            [
                ("source", f"{source['key']}" + (" (RETRACTED)" if source["retracted"] else "")),
                ("citation", source["citation"]),
                ("DOI", doi_link(source["doi"])),
                ("location in the source", source["location"]),
                ("study", e["study"]),
                ("extracted by", context.pop("extracted_by", None)),
                *sorted((k, v) for k, v in context.items() if k != "location"),
            ]
        )
        + tag("p", tag("strong", "Numbers as reported"))
        + table(tuple(e["reported"]), [tuple(e["reported"].values())])
        + pairs(
            [
                ("conversion", conversion),
                ("its published source", published),
                ("corrections", "; ".join(corrections) or NONE_TEXT),
                (f"y, se ({e['scale']} scale)", f"{e['y']!r}, {e['se']!r}"),
                (
                    "discount",
                    f"power {discount['power']:.6g}, bias shift "
                    f"{discount['bias_shift']:.6g}, bias variance {discount['bias_var']:.6g}",
                ),
                ("share of the prior's information", f"{100 * e['weight']:.2f}%"),
            ]
        )
        + table(
            ("domain", "level", "set by", "reason"),
            [
                (r["domain"], r["level"], r["rule"], r["rationale"] or NONE_TEXT)
                for r in e["ratings"]
            ],
        )
        + table(
            ("revision", "when", "by", "reason", "y", "se"),
            [
                (
                    f"{r['revision']}" + (" (used here)" if r["used"] else ""),
                    r["created_at"],
                    r["created_by"] or "not recorded",
                    r["reason"],
                    r["y"],
                    r["se"],
                )
                for r in e["revisions"]
            ],
        )
    )


def _left_out(doc: dict[str, Any]) -> Html:
    rows = [
        (x["id"], x["revision"], x["source"], x["study"], "; ".join(x["reasons"]))
        for x in doc["left_out"]
    ]
    return Html(
        tag("h2", "Entries the selection matched but left out")
        + (
            table(("entry", "revision", "source", "study", "why"), rows)
            if rows
            else tag("p", "None: every entry the filters match is used.")
        )
    )


def _conversions(doc: dict[str, Any]) -> Html:
    names = sorted({e["conversion"] for e in doc["entries"]})
    return Html(
        tag("h2", "Conversions used and their published sources")
        + table(("conversion", "published source"), [(n, conversion_source(n)) for n in names])
    )


def _figures(stored: StoredPrior, doc: dict[str, Any], check: Verification) -> Html:
    from registry.values.prior import Component

    scale = MEASURES[stored.prior.measure].scale
    rows = [
        ForestRow(
            f"entry {e['id']} {e['source']['key']}",
            e["y"],
            e["se"],
            _discount(e["discount"]),
            e["weight"],
        )
        for e in doc["entries"]
    ]
    parts = [
        tag("h2", "Figures"),
        figure(
            discount_forest_svg(rows, scale),
            "Each entry's 95% "
            "interval as reported (grey) and after its discount (blue); in brackets its share "
            "of the prior's information.",
        ),
    ]
    target = check.rebuilt.target if check.rebuilt is not None else None
    fit = dict(stored.result.fit)
    error = ", ".join(f"{k} {show(v)}" for k, v in sorted(fit.items()) if k != "method")
    if target is not None:
        robust = stored.result.robust
        vague = (
            Component.from_dict(dict(robust["component"])).reweighted(robust["weight"])
            if robust is not None
            else None
        )
        caption = f"Exact target against the emitted prior; fit: {fit.get('method')}"
        parts.append(
            figure(
                predictive_svg(target.x, target.density, stored.prior, scale, vague, caption),
                f"{caption}. Approximation error as stored by the build: {error or 'none'}. "
                "The emitted prior includes the robust component, drawn alone at its weight.",
            )
        )
    return Html("".join(parts))


def _discount(doc: Any) -> Any:
    from registry.priors.ratings import Discount

    return Discount(doc["power"], doc["bias_shift"], doc["bias_var"])


def _code(stored: StoredPrior, languages: Sequence[str]) -> Html:
    from registry.emit import emit

    parts = [tag("h2", "Emitted code")]
    for language in languages:
        parts += [tag("h3", language), tag("pre", tag("code", emit(stored.prior, language)))]
    return Html("".join(parts))


@dataclass(frozen=True)
class StudyOptions:
    """A planned study's size (`n`, `exposure` or `se`, whichever the prior's measure takes)
    and, for new data, its result (`events` or `estimate`): the options of `predict` and
    `update`, with their meaning."""

    n: float | None = None
    exposure: float | None = None
    se: float | None = None
    events: float | None = None
    estimate: float | None = None

    @property
    def given(self) -> bool:
        return any(v is not None for v in asdict(self).values())

    @property
    def observed(self) -> bool:
        return self.events is not None or self.estimate is not None


def _distribution_rows(doc: Mapping[str, Any]) -> list[tuple[str, Any]]:
    """Mean, sd and quantiles of a checks document (`predict` or `update`'s posterior)."""
    rows: list[tuple[str, Any]] = [
        ("mean", doc["mean"]),
        ("sd", "not finite" if doc["sd"] is None else doc["sd"]),
    ]
    return rows + [(f"{float(q):.1%} quantile", v) for q, v in doc["quantiles"].items()]


def _prediction(prediction: Any) -> Html:
    from registry.report.checks_plots import predictive_figure

    doc = prediction.to_dict()
    if doc["plausible"] is None:
        plausible = ("plausible range", "none: the definition sets no [output] plausible range")
    else:
        lo, hi = doc["plausible_range"]
        plausible = (f"P({lo:g} <= result <= {hi:g}), the plausible range", doc["plausible"])
    return tag(
        "section",
        tag("h3", f"Prior predictive of the planned study {show(doc['design'])}"),
        pairs(
            [
                ("predicted", doc["outcome"]),
                *_distribution_rows(doc),
                plausible,
                ("method", doc["method"]),
                ("accuracy", doc["accuracy"]),
            ]
        ),
        figure(
            svg_text(predictive_figure(prediction)),
            f"Prior predictive of the planned study's {doc['outcome']}, as "
            f"priorledger predict draws it; method: {doc['method']}.",
        ),
        id="prior-predictive",
    )


def _update(result: Any) -> Html:
    from registry.report.checks_plots import update_figure

    doc = result.to_dict()
    post, conflict = doc["posterior"], doc["conflict"]
    weights = [
        (
            i,
            c["family"],
            ", ".join(f"{k} = {show(v)}" for k, v in c.items() if k not in ("weight", "family")),
            before,
            after,
        )
        for i, (c, before, after) in enumerate(
            zip(
                post["components"],
                doc["weights"]["prior"],
                doc["weights"]["posterior"],
                strict=True,
            ),
            start=1,
        )
    ]
    posterior = tag(
        "section",
        tag("h3", f"Posterior after the new data {show(doc['data'])}"),
        pairs(
            [
                ("scale", post["scale"]),
                *_distribution_rows(post),
                ("method", post["method"]),
                ("accuracy", post["accuracy"]),
            ]
        ),
        table(
            ("component", "family", "posterior component", "prior weight", "posterior weight"),
            weights,
        ),
        figure(
            svg_text(update_figure(result)),
            "Prior, likelihood and posterior, as priorledger update draws them; method: "
            f"{post['method']}.",
        ),
        id="posterior",
    )
    return posterior + tag(
        "section",
        tag("h3", "Prior-data conflict"),
        pairs(
            [
                ("tail probability (p-value)", conflict["p_value"]),
                ("method", conflict["method"]),
                ("prior predictive", conflict["predictive"]),
                ("its accuracy", conflict["predictive_accuracy"]),
            ]
        ),
        id="conflict",
    )


def _checks(ledger: Ledger, label: str, study: StudyOptions) -> Html:
    """The checks commands' results for the options given: the update and conflict check
    (new data) first, so that its options are checked together, then the predictive of a
    study of that size."""
    if not study.given:
        return Html("")
    from registry.checks.posterior import update_prior
    from registry.checks.predictive import predict

    update = _update(update_prior(ledger, label, **asdict(study))) if study.observed else ""
    size = predict(ledger, label, n=study.n, exposure=study.exposure, se=study.se)
    return Html(tag("h2", "Checks with a planned study or new data") + _prediction(size) + update)


def render_report(
    ledger: Ledger,
    label: str,
    languages: Sequence[str],
    study: StudyOptions = StudyOptions(),
) -> tuple[str, Verification]:
    """The report of `label` as one HTML5 document, and the verification it shows (the prior
    is rebuilt at report time). With a planned study's size, also the prior predictive of its
    result; with new data, also the posterior and the prior-data conflict check (the library
    functions of `predict` and `update`)."""
    from registry.emit import LANGUAGES

    unknown = [x for x in languages if x not in LANGUAGES]
    if unknown:
        raise InputError(
            f"unknown language {unknown[0]!r}; one of {', '.join(LANGUAGES)}", field="--languages"
        )
    stored = get_prior(ledger, label)
    # before the rebuild, so that a bad option fails at once
    checks = _checks(ledger, stored.prior.label, study)
    check = verify_prior(ledger, stored.prior.label)
    doc = trace_prior(ledger, stored.prior.label)
    body = "".join(
        [
            _identity(stored, check),
            _summary(stored),
            _ess(stored),
            _figures(stored, doc, check),
            checks,
            _definition(stored.definition),
            tag("h2", f"Entries used ({len(doc['entries'])})"),
            *(_entry(e) for e in doc["entries"]),
            _left_out(doc),
            _conversions(doc),
            _code(stored, languages),
            tag("p", f"Rebuild and check: priorledger verify {stored.prior.label}"),
        ]
    )
    page = (
        '<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8">'
        f"<title>{esc(f'Prior {stored.prior.label}')}</title><style>{STYLE}</style></head>"
        f"<body>{body}</body></html>\n"
    )
    return page, check


def write_report(
    ledger: Ledger,
    label: str,
    path: str | Path,
    *,
    languages: Sequence[str] = ("stan", "pymc"),
    study: StudyOptions = StudyOptions(),
) -> Written:
    """Write the report of `label` to `path` (its folder must exist); `study` as in
    `render_report`."""
    path = Path(path)
    if not path.parent.is_dir():
        raise InputError(f"folder {path.parent} does not exist", field="--out")
    text, check = render_report(ledger, label, languages, study)
    path.write_text(text, encoding="utf-8")
    return Written(path, path.stat().st_size, "ok" if check.ok else "FAILED")

"""The HTML report: structure, self-containment, accessibility, escaping, twins and sizes.

Fixture documents come from the real pipeline: seeded series are audited with
``fitaudit.core.audit.audit_series``, adjusted across the run with ``apply_fleet_rules`` and
wrapped with ``fitaudit.tasks.outcomes.model_record`` / ``build_results``.  Pages are parsed with the
standard library's ``html.parser``; colour contrast is computed with the WCAG 2.1 formulas.
"""

from __future__ import annotations

import copy
import datetime as dt
import importlib.resources
import json
import math
import posixpath
import re
from html.parser import HTMLParser

import jinja2
import numpy as np
import pytest

from fitaudit.core.audit import AuditSettings, apply_fleet_rules, audit_series
from fitaudit.core.exceptions import InputError
from fitaudit.core.models.arima import Arima
from fitaudit.tasks import archive
from fitaudit.tasks.outcomes import model_record
from fitaudit.tasks.report import HEAT_BINS, STATUS, environment, render_archive_index, render_run
from fitaudit.tasks.results import build_results

try:
    from fitaudit.core.models.smoothing import ExpSmoothing
except ImportError:  # pragma: no cover - smoothing is optional for these tests
    ExpSmoothing = None

AS_OF = "2026-11-30"
HOSTILE = "<script>alert(1)</script>"
ATTRIBUTE_BREAKER = 'x" onmouseover="alert(2)'
RLO = "\u202e"
LONG = "y" * 10_000
META = {
    "run_id": "20261130-T010203Z-abcd",
    "started_utc": "2026-11-30T01:02:03Z",
    "finished_utc": "2026-11-30T01:04:00Z",
    "operator": "svc-audit",
    "tool_version": "0.1.0",
    "code_commit": "292b527",
    "prefect_version": "3.9.0",
}
POLICY = {
    "level": 0.05,
    "multiple_testing": "bh",
    "fdr_q": 0.10,
    "justification": "weekly audit policy",
    "approved_by": "model-risk committee",
}


# ----------------------------------------------------------------------------------------------
# fixture: a small run through the real audit pipeline
# ----------------------------------------------------------------------------------------------
def _ar1(rng: np.random.Generator, n: int, phi: float = 0.6) -> np.ndarray:
    e = rng.standard_normal(n)
    y = np.zeros(n)
    for t in range(1, n):
        y[t] = phi * y[t - 1] + e[t]
    return y


def _history(*verdicts: str) -> list[dict]:
    start = dt.date(2026, 11, 30) - dt.timedelta(weeks=len(verdicts))
    return [
        {"as_of": (start + dt.timedelta(weeks=k)).isoformat(), "verdict": v, "r_max": 0.7 + 0.05 * k, "p_value": 0.4}
        for k, v in enumerate(verdicts)
    ]


def build_fixture_document() -> dict:
    """Seven models covering the five verdicts, histories, a change point and hostile strings."""
    rng = np.random.default_rng(20261201)
    settings = AuditSettings(replicates=199, audit_window=60, change_permutations=99)
    arima = Arima(order=(1, 0, 0), trend="c")
    y = _ar1(rng, 300)
    production = arima.fit(y[:240]).params
    stale = dict(production, intercept=production["intercept"] + 2.5)  # a level shift the refit absorbs
    walk = np.cumsum(rng.standard_t(2, size=300))  # heavy-tailed random walk: AR(1) cannot describe it
    cases = [
        ("healthy-ar1", y, arima, production, _history("pass", "pass", "refit")),
        ("stale-level", y, arima, stale, _history("pass")),
        ("heavy-walk", walk, arima, production, _history("pass", "refit", "refit")),
        ("short-series", y[:20], arima, production, _history("insufficient")),
        ("gappy", np.r_[y[:100], np.nan, y[100:]], arima, None, []),
    ]
    if ExpSmoothing is not None:
        trend = np.cumsum(rng.standard_normal(200)) + 0.1 * np.arange(200)
        cases.append(("trend-ets", trend, ExpSmoothing(trend="add"), None, _history(*["pass"] * 9)))
    days = lambda n: np.arange(np.datetime64("2026-11-30") - n + 1, np.datetime64("2026-11-30") + 1)  # noqa: E731 (daily, ending at the as-of date)
    results = [
        audit_series(series, spec, production=prod, settings=settings, label=name, timestamps=days(len(series)))
        for name, series, spec, prod, _ in cases
    ]
    results = apply_fleet_rules(
        results, q=POLICY["fdr_q"], histories=[[h["verdict"] for h in hist] for *_, hist in cases]
    )
    records = []
    for (name, series, spec, prod, hist), res in zip(cases, results):
        entry = {
            "id": name,
            "safe_id": name,
            "owner": "forecasting-team",
            "tier": 2,
            "description": f"Weekly demand, {name}",
            "source": "demo",
            "series": name,
        }
        candidates = None
        if res.verdict == "respecify":
            entry["owner"] = ATTRIBUTE_BREAKER
            entry["description"] = RLO + "reversed " + LONG
            candidates = [{"spec_text": "ARIMA(0,1,1)" + HOSTILE, "noise": "student-t", "r_max": 0.91, "p_value": 0.21}]
        records.append(
            model_record(
                entry,
                as_of=AS_OF,
                verdict=res.verdict,
                reasons=res.reasons,
                audit=res.to_dict(),
                spec_text=spec.describe(),
                lineage={
                    "extract": {"digest": "ab" * 32, "rows": int(series.size), "columns": ["value", "<img src=x>"]},
                    "windows": {"audit": 60},
                },
                settings=settings.to_dict(),
                production_version={"version": 3, "sha256": "cd" * 32, "created_at": "2026-10-01T00:00:00Z"}
                if prod
                else None,
                history=hist,
                candidates=candidates,
                escalated=res.escalated,
            )
        )
    records.append(
        model_record(  # a registry entry that never reached the audit
            {"id": HOSTILE, "safe_id": "entry-7", "owner": None},
            as_of=AS_OF,
            verdict="error",
            reasons=[f"models[6].id: {HOSTILE!s} is not a usable id; use letters, digits, '.', '_' or '-'."],
            audit=None,
            spec_text="unknown",
        )
    )
    doc = build_results(
        as_of=AS_OF,
        registry={"path": "registry.yaml", "sha256": "ef" * 32},
        policy=POLICY,
        records=records,
        tool_version="0.1.0",
    )
    return json.loads(json.dumps(doc))  # exactly what results.json holds


@pytest.fixture(scope="module")
def doc() -> dict:
    return build_fixture_document()


@pytest.fixture(scope="module")
def pages(doc) -> dict[str, bytes]:
    return render_run(doc, META)


@pytest.fixture(scope="module")
def dom(pages) -> dict[str, Node]:
    return {name: parse(data) for name, data in pages.items()}


def test_fixture_covers_every_verdict(doc):
    verdicts = {m["verdict"] for m in doc["models"]}
    assert verdicts == set(STATUS), verdicts  # the fixture must exercise pass, refit, respecify, insufficient, error
    assert any(m["audit"] and m["audit"]["change"] for m in doc["models"])  # a located change point


# ----------------------------------------------------------------------------------------------
# a tiny DOM over html.parser
# ----------------------------------------------------------------------------------------------
VOID = {"area", "base", "br", "col", "embed", "hr", "img", "input", "link", "meta", "source", "track", "wbr"}


class Node:
    def __init__(self, tag: str, attrs: dict, parent: Node | None):
        self.tag, self.attrs, self.parent, self.children = tag, attrs, parent, []

    def text(self) -> str:
        return "".join(c if isinstance(c, str) else c.text() for c in self.children)

    def iter(self, tag: str | None = None):
        for c in self.children:
            if isinstance(c, Node):
                if tag is None or c.tag == tag:
                    yield c
                yield from c.iter(tag)

    def elements(self) -> list[Node]:
        return [c for c in self.children if isinstance(c, Node)]

    def classes(self) -> set[str]:
        return set((self.attrs.get("class") or "").split())

    def find_id(self, ident: str) -> Node | None:
        return next((n for n in self.iter() if n.attrs.get("id") == ident), None)


class _Builder(HTMLParser):
    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.root = Node("#document", {}, None)
        self.cur = self.root
        self.doctype = None

    def handle_decl(self, decl):
        self.doctype = decl

    def handle_starttag(self, tag, attrs):
        node = Node(tag, dict(attrs), self.cur)
        self.cur.children.append(node)
        if tag not in VOID:
            self.cur = node

    def handle_startendtag(self, tag, attrs):
        self.cur.children.append(Node(tag, dict(attrs), self.cur))

    def handle_endtag(self, tag):
        node = self.cur
        while node is not None and node.tag != tag:
            node = node.parent
        assert node is not None, f"end tag </{tag}> without a start tag"
        self.cur = node.parent

    def handle_data(self, data):
        self.cur.children.append(data)


def parse(data: bytes) -> Node:
    b = _Builder()
    b.feed(data.decode("utf-8"))
    b.close()
    assert b.cur is b.root, f"unclosed element <{b.cur.tag}>"
    assert b.doctype and b.doctype.lower() == "doctype html"
    return b.root


def table_rows(table: Node) -> tuple[list[str], list[tuple[Node, list[str]]]]:
    """Header texts and (row, cell texts) of a simple table."""
    header = [c.text().strip() for c in next(table.iter("thead")).iter() if c.tag in ("th", "td")]
    rows = []
    for tr in next(table.iter("tbody")).iter("tr"):
        rows.append((tr, [c.text().strip() for c in tr.elements() if c.tag in ("th", "td")]))
    return header, rows


def table_by_caption(root: Node, start: str) -> Node:
    for t in root.iter("table"):
        cap = next(t.iter("caption"), None)
        if cap is not None and cap.text().strip().startswith(start):
            return t
    raise AssertionError(f"no table captioned {start!r}")


def printed_matches(printed: str, value) -> bool:
    """True when ``printed`` is ``value`` rounded to the digits shown (n/a, ∞ and "< 0.001" included)."""
    printed = printed.strip()
    if printed == "n/a":
        return value is None or value == "nan"
    if printed == "∞":
        return value == "inf"
    if printed == "< 0.001":
        return value is not None and float(value) < 0.001
    if value is None or isinstance(value, str):
        return False
    if "e" in printed:
        mantissa = printed.split("e")[0]
        decimals = len(mantissa.split(".")[1]) if "." in mantissa else 0
        return math.isclose(float(printed), value, rel_tol=0.51 * 10.0**-decimals)
    decimals = len(printed.split(".")[1]) if "." in printed else 0
    return abs(float(printed) - value) <= 0.5 * 10.0**-decimals * (1 + 1e-9)


def test_printed_matches_helper_can_fail():
    assert printed_matches("0.738", 0.73812) and printed_matches("184", 184.2) and printed_matches("< 0.001", 0.0005)
    assert (
        not printed_matches("0.74", 0.7312) and not printed_matches("< 0.001", 0.01) and not printed_matches("n/a", 0.3)
    )


# ----------------------------------------------------------------------------------------------
# pages, language, title, self-containment
# ----------------------------------------------------------------------------------------------
def test_one_page_per_model_plus_run_and_method(doc, pages):
    expected = {"index.html", "method.html"} | {f"models/{m['safe_id']}.html" for m in doc["models"]}
    assert set(pages) == expected
    assert all(isinstance(v, bytes) and v.decode("utf-8") for v in pages.values())


def test_every_page_has_language_title_and_charset(dom):
    for name, root in dom.items():
        html = next(root.iter("html"))
        assert html.attrs.get("lang") == "en", name  # source: WCAG 2.1 SC 3.1.1 Language of Page
        titles = list(root.iter("title"))
        page_title = [t for t in titles if t.parent.tag == "head"]
        assert len(page_title) == 1 and page_title[0].text().strip(), name  # source: WCAG 2.1 SC 2.4.2 Page Titled
        assert any(m.attrs.get("charset", "").lower() == "utf-8" for m in root.iter("meta")), name


RESOURCE_TAGS = {
    "script",
    "img",
    "link",
    "iframe",
    "frame",
    "object",
    "embed",
    "audio",
    "video",
    "source",
    "track",
    "base",
    "form",
    "input",
    "image",
    "use",
    "foreignobject",
}


def _check_self_contained(
    name: str, root: Node, raw: str, targets: dict[str, Node], archive_links: bool = False
) -> None:
    for node in root.iter():
        assert node.tag not in RESOURCE_TAGS, f"{name}: <{node.tag}> loads or runs something"
        for attr, value in node.attrs.items():
            assert not attr.startswith("on"), f"{name}: event handler attribute {attr}"
            assert attr not in ("src", "srcset", "xlink:href", "action", "formaction", "poster", "data"), (
                f"{name}: {attr}={value!r}"
            )
        if "href" in node.attrs:
            href = node.attrs["href"]
            assert node.tag == "a", f"{name}: href on <{node.tag}>"
            assert not re.match(r"^[a-zA-Z][a-zA-Z0-9+.-]*:", href) and not href.startswith(("/", "\\")), (
                f"{name}: external link {href!r}"
            )
            path, _, fragment = href.partition("#")
            if archive_links:
                assert re.fullmatch(r"runs/\d{4}/[A-Za-z0-9][A-Za-z0-9_.-]*/index\.html", path) or (
                    not path and fragment
                ), href
                continue
            target_name = posixpath.normpath(posixpath.join(posixpath.dirname(name), path)) if path else name
            assert target_name in targets, f"{name}: link {href!r} leaves the run's pages"
            if fragment:
                assert targets[target_name].find_id(fragment) is not None, f"{name}: link {href!r} to a missing anchor"
    lowered = raw.lower()
    for needle in ("url(", "@import", "javascript:", "http://", "https://", "//cdn", "<script"):
        assert needle not in lowered, f"{name}: contains {needle!r}"


def test_pages_are_self_contained(pages, dom):
    # source: docs/architecture.md §4 (self-contained pages: no external src/href/url() references)
    for name, root in dom.items():
        _check_self_contained(name, root, pages[name].decode("utf-8"), dom)


def test_self_containment_check_can_fail(dom):
    bad = parse(
        b'<!DOCTYPE html><html lang="en"><head><title>x</title></head><body><a '
        b'href="https://example.org/">x</a></body></html>'
    )
    with pytest.raises(AssertionError, match="external link"):
        _check_self_contained("index.html", bad, "", dom)


# ----------------------------------------------------------------------------------------------
# accessibility: tables, charts, status, contrast
# ----------------------------------------------------------------------------------------------
def test_every_table_has_a_caption_and_scoped_headers(dom):
    # source: WCAG 2.1 SC 1.3.1 Info and Relationships (H39 captions, H63 scope); docs/architecture.md §4
    count = 0
    for name, root in dom.items():
        for table in root.iter("table"):
            count += 1
            first = table.elements()[0]
            assert first.tag == "caption" and first.text().strip(), f"{name}: table without a leading caption"
            for th in table.iter("th"):
                assert th.attrs.get("scope") in ("col", "row"), f"{name}: <th>{th.text()[:40]}</th> without scope"
    assert count > 20


def test_every_chart_has_a_text_alternative(dom):
    # source: WCAG 2.1 SC 1.1.1 Non-text Content; docs/architecture.md §4 (a data table for each chart)
    svgs = 0
    for name, root in dom.items():
        for svg in root.iter("svg"):
            svgs += 1
            assert svg.attrs.get("role") == "img", name
            ids = svg.attrs.get("aria-labelledby", "").split()
            assert len(ids) == 2, name
            title, desc = (svg.find_id(i) for i in ids)
            assert title is not None and title.tag == "title" and title.text().strip(), name
            assert desc is not None and desc.tag == "desc" and len(desc.text().strip()) > 30, name
        for fig in root.iter("figure"):
            assert any(c.tag == "figcaption" and c.text().strip() for c in fig.elements()), name
            if name.startswith("models/"):
                assert next(fig.iter("table"), None) is not None, (
                    f"{name}: figure {fig.attrs.get('id')} has no data table"
                )
    assert svgs >= 10


def test_status_is_shown_by_symbol_and_word(dom, doc):
    # source: WCAG 2.1 SC 1.4.1 Use of Color (status never by colour alone)
    symbols = {sym for sym, _ in STATUS.values()}
    assert len(symbols) == len(STATUS)
    coloured = 0
    for name, root in dom.items():
        for node in root.iter():
            keys = [c[3:] for c in node.classes() if c.startswith("st-")]
            for key in keys:
                coloured += 1
                symbol, word = STATUS[key]
                text = node.text()
                assert symbol in text and word in text, (
                    f"{name}: status colour {key} on {text!r} without symbol and word"
                )
    assert coloured > len(doc["models"]) * 3
    run = dom["index.html"]
    headers = [th.text().strip() for th in next(run.find_id("counts").iter("thead")).iter("th")]
    assert headers[2:] == [f"{s} {w}" for s, w in STATUS.values()]


CSS_CONTRAST_SOURCE = (
    "WCAG 2.1: definitions of relative luminance and contrast ratio; SC 1.4.3 (4.5:1) and SC 1.4.11 (3:1)"
)


def _relative_luminance(hex_colour: str) -> float:
    # source: WCAG 2.1, definition "relative luminance" (sRGB, threshold 0.03928 as printed there)
    channels = [int(hex_colour[i : i + 2], 16) / 255 for i in (1, 3, 5)]
    lin = [c / 12.92 if c <= 0.03928 else ((c + 0.055) / 1.055) ** 2.4 for c in channels]
    return 0.2126 * lin[0] + 0.7152 * lin[1] + 0.0722 * lin[2]


def _contrast(a: str, b: str) -> float:
    # source: WCAG 2.1, definition "contrast ratio" (L1 + 0.05) / (L2 + 0.05)
    la, lb = sorted((_relative_luminance(a), _relative_luminance(b)), reverse=True)
    return (la + 0.05) / (lb + 0.05)


def _stylesheet() -> str:
    return importlib.resources.files("fitaudit.templates").joinpath("report.css").read_text(encoding="utf-8")


def _palette(css: str) -> dict[str, str]:
    root = re.search(r":root\s*\{(.*?)\}", css, re.S).group(1)
    return {name: value.lower() for name, value in re.findall(r"--([a-z0-9-]+)\s*:\s*(#[0-9a-fA-F]{6})\s*;", root)}


def test_contrast_formula_matches_the_definition():
    assert _contrast("#000000", "#ffffff") == pytest.approx(
        21.0
    )  # source: WCAG 2.1 contrast ratio (ranges from 1 to 21)
    assert _contrast("#777777", "#777777") == pytest.approx(
        1.0
    )  # source: WCAG 2.1 contrast ratio (equal colours give 1)
    assert _contrast("#767676", "#ffffff") == pytest.approx(
        4.54, abs=0.01
    )  # from memory: #767676 is the lightest grey passing 4.5:1 on white


def test_palette_contrast_meets_wcag_aa():
    # source: CSS_CONTRAST_SOURCE; pairs follow the naming convention documented at the top of report.css
    palette = _palette(_stylesheet())
    group = lambda prefix: {k: v for k, v in palette.items() if k.startswith(prefix)}  # noqa: E731
    bgs, inks, marks, heats, overs = group("bg-"), group("ink-"), group("mark-"), group("heat-"), group("over-")
    assert len(bgs) >= 5 and len(inks) >= 2 and len(marks) >= 5 and len(heats) >= 8 and overs
    failures = []
    # the scale's cells sit inside a framed map (see report.css); the grey cells must stand out from the page
    symbol_cells = {k: v for k, v in heats.items() if k in ("heat-inf", "heat-na")}
    ink = {"over-ink": palette["over-ink"]}
    for fg_group, bg_group, need in (
        (inks, bgs, 4.5),
        (marks, bgs, 3.0),
        (symbol_cells, bgs, 3.0),
        (ink, heats, 3.0),
        (ink, {"over-halo": palette["over-halo"]}, 4.5),
    ):
        for f, fc in fg_group.items():
            for b, bc in bg_group.items():
                if _contrast(fc, bc) < need:
                    failures.append(f"--{f} on --{b}: {_contrast(fc, bc):.2f} < {need}")
    for symbol_cell in ("heat-inf", "heat-na"):
        if _contrast(palette["over-ink"], palette[symbol_cell]) < 4.5:
            failures.append(f"--over-ink on --{symbol_cell}")
    assert not failures, failures


def _lab(hex_colour: str, simulate: np.ndarray | None = None) -> np.ndarray:
    """CIELAB (D65) of an sRGB colour, optionally as seen with a colour-vision deficiency."""
    # source: IEC 61966-2-1 (sRGB transfer function and matrix to XYZ); CIE 15:2004 (L*a*b*, white D65)
    c = np.array([int(hex_colour[i : i + 2], 16) / 255 for i in (1, 3, 5)])
    lin = np.where(c <= 0.04045, c / 12.92, ((c + 0.055) / 1.055) ** 2.4)
    if simulate is not None:
        lin = np.clip(simulate @ lin, 0.0, 1.0)
    xyz = (
        np.array([[0.4124, 0.3576, 0.1805], [0.2126, 0.7152, 0.0722], [0.0193, 0.1192, 0.9505]])
        @ lin
        / np.array([0.95047, 1.0, 1.08883])
    )
    f = np.where(xyz > (6 / 29) ** 3, np.cbrt(xyz), xyz / (3 * (6 / 29) ** 2) + 4 / 29)
    return np.array([116 * f[1] - 16, 500 * (f[0] - f[1]), 200 * (f[1] - f[2])])


# from memory: Machado, Oliveira and Fernandes (2009), "A physiologically-based model for simulation of
# color vision deficiency", IEEE TVCG 15(6), the matrices for severity 1.0 (applied to linear RGB)
CVD = {
    "protanopia": np.array(
        [[0.152286, 1.052583, -0.204868], [0.114503, 0.786281, 0.099216], [-0.003882, -0.048116, 1.051998]]
    ),
    "deuteranopia": np.array(
        [[0.367322, 0.860646, -0.227968], [0.280085, 0.672501, 0.047413], [-0.011820, 0.042940, 0.968881]]
    ),
    "tritanopia": np.array(
        [[1.255528, -0.076749, -0.178779], [-0.078411, 0.930809, 0.147602], [0.004733, 0.691367, 0.303900]]
    ),
}


def test_lab_conversion_matches_published_values():
    assert _lab("#ffffff") == pytest.approx([100.0, 0.0, 0.0], abs=0.05)  # source: CIE 15:2004, the reference white
    assert _lab("#000000") == pytest.approx([0.0, 0.0, 0.0], abs=1e-9)
    assert _lab("#ff0000") == pytest.approx([53.24, 80.09, 67.20], abs=0.1)  # from memory: sRGB red in CIELAB D65
    assert _lab("#777777", CVD["deuteranopia"])[0] == pytest.approx(_lab("#777777")[0], abs=0.5)  # greys stay grey


def test_divergence_map_scale_is_ordered_and_reads_without_colour():
    palette = _palette(_stylesheet())
    below = [palette[f"heat-{k}"] for k in (4, 3, 2, 1)]  # from the critical value down (0.75-1 ... <= 0.25)
    above = [palette[f"heat-{k}"] for k in (5, 6, 7, 8)]  # from the critical value up (1-1.5 ... > 4)
    assert HEAT_BINS[3] == 1.0  # h1..h4 are below the critical value, h5..h8 above
    lightness = lambda side: [_lab(c)[0] for c in side]  # noqa: E731
    for side in (below, above):
        steps = np.diff(lightness(side))
        assert (steps <= -8).all(), steps  # darker with distance from the critical value, visibly so in greyscale
    all_l = sorted(lightness(below) + lightness(above))
    assert min(np.diff(all_l)) >= 4  # no two classes share a grey
    assert lightness(above)[0] <= lightness(below)[0] - 10  # crossing the critical value darkens the cell
    hue = lambda c: np.degrees(np.arctan2(_lab(c)[2], _lab(c)[1])) % 360  # noqa: E731
    for side in (below, above):
        hues = [hue(c) for c in side]
        assert max(hues) - min(hues) <= 35, hues  # one hue family per side
    gap = abs(np.mean([hue(c) for c in below]) - np.mean([hue(c) for c in above]))
    assert min(gap, 360 - gap) >= 120  # two clearly different families
    for name, matrix in {"normal vision": None, **CVD}.items():
        seen_below = [_lab(c, matrix) for c in below]
        seen_above = [_lab(c, matrix) for c in above]
        cross = min(np.linalg.norm(a - b) for a in seen_below for b in seen_above)
        assert cross >= 25, (name, cross)  # CIE76 difference: the families stay apart
        for side in (seen_below, seen_above):
            assert min(np.linalg.norm(a - b) for a, b in zip(side, side[1:])) >= 8, name  # neighbouring classes too


def test_stylesheet_uses_only_palette_colours_in_their_roles():
    css = _stylesheet()
    palette = _palette(css)
    body = re.sub(r":root\s*\{.*?\}", "", css, count=1, flags=re.S)
    assert not re.search(r"#[0-9a-fA-F]{3,8}\b|rgb|hsl", body), "colour literal outside the palette"
    used = set(re.findall(r"var\(--([a-z0-9-]+)\)", body))
    assert used <= set(palette), used - set(palette)
    for prop, allowed in (
        ("color", ("ink-",)),
        ("fill", ("ink-", "mark-", "heat-", "over-")),
        ("stroke", ("mark-", "over-", "deco-")),
    ):
        for value in re.findall(rf"(?<![-a-z]){prop}\s*:\s*([^;}}]+)", body):
            if value.strip() == "none":
                continue
            names = re.findall(r"var\(--([a-z0-9-]+)\)", value)
            assert names and all(n.startswith(allowed) for n in names), f"{prop}: {value}"
    for value in re.findall(r"(?<![-a-z])background(?:-color)?\s*:\s*([^;}]+)", body):
        names = re.findall(r"var\(--([a-z0-9-]+)\)", value)
        assert names and all(n.startswith(("bg-", "heat-")) for n in names), f"background: {value}"


def test_every_chart_mark_has_a_palette_colour(dom):
    """Each class drawn in an SVG is coloured by a rule of the stylesheet (so the contrast test covers it)."""
    css = _stylesheet()
    drawn = {
        cls
        for root in dom.values()
        for svg in root.iter("svg")
        for node in svg.iter()
        if node.tag != "svg"
        for cls in node.classes()
    }
    assert {"edge", "mem", "mx", "bar", "pt", "ref", "stem"} <= drawn
    for cls in drawn:
        rule = re.search(rf"svg \.{re.escape(cls)}\s*\{{([^}}]*)\}}", css)
        assert rule and re.search(r"(fill|stroke)\s*:\s*var\(--", rule.group(1)), f"class {cls} has no colour rule"


def test_print_stylesheet_is_a4_and_keeps_rows_whole():
    css = _stylesheet()
    start = css.index("@media print")
    block = css[start:]
    assert re.search(r"@page\s*\{[^}]*size:\s*A4", block)
    assert re.search(r"tr[^{]*\{[^}]*break-inside:\s*avoid", block)
    assert "details::details-content" in block  # data tables in <details> print too
    assert not re.search(r"display:\s*none", block.replace("nav.top { display: none; }", "")), (
        "print hides something besides navigation"
    )


# ----------------------------------------------------------------------------------------------
# twins: the pages say what the document says
# ----------------------------------------------------------------------------------------------
def test_run_page_counts_match_the_document(doc, dom):
    run = dom["index.html"]
    header, rows = table_rows(run.find_id("counts"))
    values = dict(zip(header, rows[0][1]))
    s = doc["summary"]
    assert int(values["Registered"]) == s["registered"] == len(doc["models"])
    assert int(values["Audited"]) == s["audited"]
    for verdict, (symbol, word) in STATUS.items():
        assert int(values[f"{symbol} {word}"]) == s[verdict] == sum(m["verdict"] == verdict for m in doc["models"])
    assert sum(int(values[f"{sym} {w}"]) for sym, w in STATUS.values()) == int(values["Registered"])
    assert run.find_id("reconcile").text().startswith(f"Reconciled: {s['registered']} registered")
    flags = run.find_id("false-flags").text()
    expected = s["expected_false_flags_unadjusted"]
    assert expected == pytest.approx(s["checks"] * POLICY["level"])
    printed = re.search(r"about (\S+) of them", flags).group(1)
    assert printed_matches(printed, expected)
    assert f"scored {s['checks']} checks" in flags and "Benjamini-Hochberg" in flags and "q = 0.1" in flags


def test_exceptions_table_is_sorted_by_severity_with_one_reason_each(doc, dom):
    table = dom["index.html"].find_id("exceptions").iter("table").__next__()
    header, rows = table_rows(table)
    expected = sorted((m for m in doc["models"] if m["verdict"] != "pass"), key=lambda m: (m["severity"], m["id"]))
    assert [r[header.index("Model")] for _, r in rows] == [m["id"] for m in expected]
    for (_, cells), m in zip(rows, expected):
        symbol, word = STATUS[m["verdict"]]
        assert cells[header.index("Status")].startswith(f"{symbol} {word}")
        assert cells[header.index("Reason")] == m["reasons"][0]
    links = [next(tr.iter("a")).attrs["href"] for tr, _ in rows]
    assert links == [f"models/{m['safe_id']}.html" for m in expected]


def test_run_page_rows_match_the_document(doc, dom):
    run = dom["index.html"]
    table = next(run.find_id("trail").iter("table"))
    header, rows = table_rows(table)
    by_anchor = {tr.attrs["id"]: cells for tr, cells in rows}
    assert len(by_anchor) == len(doc["models"])
    for m in doc["models"]:
        cells = by_anchor[f"model-{m['safe_id']}"]
        symbol, word = STATUS[m["verdict"]]
        assert cells[header.index("Verdict")] == f"{symbol} {word}"
        assert cells[header.index("now")] == f"{symbol} {word}"
        check = None
        if m["audit"]:
            check = m["audit"]["production"] or m["audit"]["refit"]
            check = check if check["status"] == "ok" else None
        assert printed_matches(cells[header.index("R")], check and check["r_max"])
        assert printed_matches(cells[header.index("p")], check and check["p_value"])
        assert printed_matches(cells[header.index("p adj.")], check and check["p_adjusted"])
        trail = cells[header.index("−7") : header.index("now") + 1]
        past = [h["verdict"] for h in m["history"]][-7:]
        expected = (
            ["· no audit"] * (7 - len(past)) + [f"{STATUS[v][0]} {STATUS[v][1]}" for v in past] + [f"{symbol} {word}"]
        )
        assert trail == expected


def test_movement_matches_the_document(doc, dom):
    run = dom["index.html"]
    header, rows = table_rows(run.find_id("movement-counts"))
    counts = dict(zip(header, rows[0][1]))
    moves = doc["summary"]["movement"]
    assert {
        k: int(counts[label])
        for k, label in (
            ("new", "new exception"),
            ("persisting", "persisting"),
            ("resolved", "resolved"),
            ("steady", "still passing"),
            ("first", "first audit"),
        )
    } == moves
    for key in ("new", "persisting", "resolved"):
        listed = [a.text() for a in run.find_id(f"moved-{key}").iter("a")]
        assert listed == [m["id"] for m in doc["models"] if m["movement"] == key]
    assert (
        moves["resolved"] >= 1 and moves["persisting"] >= 1 and moves["new"] >= 1
    )  # the fixture moves in every direction


CHECK_FIELDS = {
    "Standardised maximum R of the gate": "r_max",
    "Largest statistic of the map T_max (equiprobable cells)": "t_max",
    "p, distribution gate": "p_distribution",
    "p, independence gate (Ljung-Box)": "p_independence",
    "p, check (Bonferroni over the two gates)": "p_value",
    "p, adjusted across the run": "p_adjusted",
    "Effect: T_max / 2n": "effect_divergence",
    "Effect: largest |autocorrelation|": "effect_acf",
}


def test_model_pages_match_the_document(doc, dom):
    compared = 0
    for m in doc["models"]:
        page = dom[f"models/{m['safe_id']}.html"]
        article = page.find_id(f"model-{m['safe_id']}")
        assert article is not None and article.tag == "article"
        symbol, word = STATUS[m["verdict"]]
        assert f"Verdict: {symbol} {word}" in page.find_id("verdict").text()
        reasons = [li.text() for li in next(page.find_id("verdict").iter("ol")).iter("li")]
        assert reasons == m["reasons"]
        if not m["audit"]:
            continue
        header, rows = table_rows(next(page.find_id("checks").iter("table")))
        by_label = {cells[0]: cells[1:] for _, cells in rows}
        for kind, column in (("production", 0), ("refit", 1)):
            check = m["audit"][kind]
            if check is None:
                assert by_label["Status"][column].startswith("not run")
                continue
            assert by_label["Status"][column].startswith("ran" if check["status"] == "ok" else check["status"])
            if check["status"] != "ok":
                continue
            assert int(by_label["Residuals n"][column]) == check["n"]
            assert int(by_label["Cells s"][column]) == check["cells"]
            assert (
                by_label["Ljung-Box"][column].startswith("Q ")
                and f"on {check['ljung_box']['lags']} lags, df {check['ljung_box']['df']}"
                in by_label["Ljung-Box"][column]
            )
            for label, field in CHECK_FIELDS.items():
                shown = by_label[label][column].split(" (")[0]  # a threshold or floor may follow in parentheses
                assert printed_matches(shown, check[field]), (
                    m["id"],
                    kind,
                    label,
                    by_label[label][column],
                    check[field],
                )
                compared += 1
    assert compared >= 40


def _scored_map_figures(doc, dom):
    """``(check, its heat map's figure)`` for every check of the fixture that scored its residuals."""
    for m in doc["models"]:
        for kind in ("production", "refit"):
            check = (m["audit"] or {}).get(kind)
            if check and check["status"] == "ok":
                yield check, dom[f"models/{m['safe_id']}.html"].find_id(f"figure-map-{kind}")


def test_map_tables_match_the_scaled_grid(doc, dom):
    maps = 0
    for check, fig in _scored_map_figures(doc, dom):
        table = next(fig.iter("table"))
        bold = sum(1 for td in table.iter("td") if "fail" in td.classes())
        infinite = sum(1 for td in table.iter("td") if td.text() == "∞")
        grid, inf_mask = check["scaled_grid"], check["map"]["infinite"]
        assert bold == sum(
            1 for row, mask in zip(grid, inf_mask) for v, i in zip(row, mask) if v is not None and not i and v > 1
        )
        assert infinite == sum(map(sum, inf_mask))
        _, rows = table_rows(table)
        top_alpha = rows[0][1][0]
        assert printed_matches(top_alpha, check["map"]["alphas"][-1])  # rows run from the largest alpha down
        svg = next(fig.iter("svg"))
        assert sum(1 for r in svg.iter("rect")) == len(grid) * len(grid[0])
        assert (sum(1 for p in svg.iter("path") if p.attrs.get("class") == "edge") == 1) == (
            bold > 0
        )  # the boundary is drawn iff a point fails
        assert sum(1 for c in svg.iter("circle") if c.attrs.get("class") == "mem") == 5  # the five classical members
        assert sum(1 for p in svg.iter("path") if p.attrs.get("class") == "mx") == 1  # the maximum
        maps += 1
    assert maps >= 6


def test_map_cells_and_outline_follow_the_grid(doc, dom):
    """Each cell of a heat map sits at its (alpha, beta) place with the class of its value, and the
    outline is exactly the sides of failing cells that border a passing cell or the grid's edge
    (the cells' text and sides are made once per grid size: this checks them against the grid)."""
    outlined = 0
    for check, fig in _scored_map_figures(doc, dom):
        grid, inf_mask = check["scaled_grid"], check["map"]["infinite"]
        na, nb = len(grid), len(grid[0])
        svg = next(fig.iter("svg"))
        rects = {(float(r.attrs["x"]), float(r.attrs["y"])): r.attrs["class"] for r in svg.iter("rect")}
        left = min(x for x, _ in rects)
        top = min(y for _, y in rects)
        width = {float(r.attrs["width"]) for r in svg.iter("rect")}
        height = {float(r.attrs["height"]) for r in svg.iter("rect")}
        assert len(width) == len(height) == 1 and len(rects) == na * nb
        cw, ch = width.pop(), height.pop()
        fails = np.zeros((na, nb), dtype=bool)
        for i in range(na):
            for j in range(nb):
                v, infinite = grid[i][j], inf_mask[i][j]
                expected = "hinf" if infinite else "hna" if v is None else f"h{1 + sum(v > b for b in HEAT_BINS)}"
                # the first alpha is the bottom row
                assert rects[(left + j * cw, top + (na - 1 - i) * ch)] == expected
                fails[i, j] = v is not None and not infinite and v > 1
        sides = set()
        for i, j in zip(*np.nonzero(fails)):
            x0, y0 = left + j * cw, top + (na - 1 - i) * ch
            if i + 1 == na or not fails[i + 1, j]:
                sides.add(("H", x0, y0, x0 + cw))
            if i == 0 or not fails[i - 1, j]:
                sides.add(("H", x0, y0 + ch, x0 + cw))
            if j == 0 or not fails[i, j - 1]:
                sides.add(("V", x0, y0, y0 + ch))
            if j + 1 == nb or not fails[i, j + 1]:
                sides.add(("V", x0 + cw, y0, y0 + ch))
        edge = [p.attrs["d"] for p in svg.iter("path") if p.attrs.get("class") == "edge"]
        drawn = set()
        for x, y, direction, end in re.findall(r"M([-\d.]+) ([-\d.]+)([HV])([-\d.]+)", "".join(edge)):
            drawn.add((direction, float(x), float(y), float(end)))
        assert drawn == sides
        outlined += bool(sides)
    assert outlined >= 2


# ----------------------------------------------------------------------------------------------
# escaping and hostile input
# ----------------------------------------------------------------------------------------------
def test_hostile_strings_render_harmlessly(doc, pages, dom):
    for name, data in pages.items():
        text = data.decode("utf-8")
        assert HOSTILE not in text and "<img src" not in text, name
        assert RLO not in text, name  # direction overrides are shown, never applied
        for node in dom[name].iter():
            assert not any(a.startswith("on") for a in node.attrs), name
    run = pages["index.html"].decode("utf-8")
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in run
    respecify = next(m for m in doc["models"] if m["verdict"] == "respecify")
    page = dom[f"models/{respecify['safe_id']}.html"]
    identity = page.find_id("identity").text()
    assert "[U+202E]reversed " + LONG in identity  # the 10,000-character description, in full
    assert ATTRIBUTE_BREAKER in identity
    candidates = page.find_id("candidates").text()
    assert "ARIMA(0,1,1)" + HOSTILE in candidates  # escaped in the markup, intact as text
    hostile_page = dom["models/entry-7.html"]
    assert HOSTILE in next(hostile_page.iter("h1")).text()
    assert HOSTILE in next(hostile_page.iter("title")).text()


def test_user_text_shows_exactly_the_controls_and_direction_characters():
    """Over the first two planes, a character is shown as ``[U+XXXX]`` exactly when it is a control
    (category Cc) other than tab and newline, or a character that changes direction or breaks a line."""
    import unicodedata

    from fitaudit.tasks.report.text import user_text

    # source: Unicode Standard Annex #9 (Unicode Bidirectional Algorithm), section 2: the Arabic letter
    # mark, the left-to-right and right-to-left marks, embeddings and overrides, isolates; U+2028 and
    # U+2029 are the line and paragraph separators (Unicode Standard, chapter 5.8)
    direction = {0x061C, 0x200E, 0x200F, 0x2028, 0x2029, *range(0x202A, 0x202F), *range(0x2066, 0x206A)}
    chars = [chr(c) for c in range(0x20000)]
    shown = [
        f"[U+{ord(ch):04X}]" if ord(ch) in direction or (unicodedata.category(ch) == "Cc" and ch not in "\t\n") else ch
        for ch in chars
    ]
    assert sum(s != ch for s, ch in zip(shown, chars)) == 63 + 14  # 65 Cc code points but tab, newline; 14 others
    assert user_text("".join(chars)) == "".join(shown)
    assert user_text("a\u202eb", 2) == "a[U+202E]… (+1 characters)"  # cut first, then shown


def test_long_values_are_cut_on_the_run_page_only(doc):
    long_doc = copy.deepcopy(doc)
    target = next(m for m in long_doc["models"] if m["verdict"] == "refit")
    target["id"] = "z" * 10_000
    target["owner"] = "o" * 10_000
    pages = render_run(long_doc, META)
    run = pages["index.html"].decode("utf-8")
    assert "z" * 10_000 not in run and "z" * 160 + "… (+9840 characters)" in run
    model = pages[f"models/{target['safe_id']}.html"].decode("utf-8")
    assert "z" * 10_000 in model and "o" * 10_000 in model


@pytest.mark.parametrize("safe_id", ["../escape", "a/b", "", ".hidden", "x" * 200, "semi;colon"])
def test_unsafe_file_names_are_refused(doc, safe_id):
    bad = copy.deepcopy(doc)
    bad["models"][0]["safe_id"] = safe_id
    with pytest.raises(InputError, match="not a safe file name"):
        render_run(bad, META)


def test_duplicate_file_names_and_missing_metadata_are_refused(doc):
    bad = copy.deepcopy(doc)
    bad["models"][1]["safe_id"] = bad["models"][0]["safe_id"].upper()
    with pytest.raises(InputError, match="share the file name"):
        render_run(bad, META)
    with pytest.raises(InputError, match="meta lacks prefect_version"):
        render_run(doc, {k: v for k, v in META.items() if k != "prefect_version"})


def test_a_run_of_an_installed_package_has_no_commit_and_still_renders(doc):
    # fitaudit installed from a wheel is no git checkout: code_commit() gives None
    pages = render_run(doc, dict(META, code_commit=None))
    tool = next(dd for dd in parse(pages["index.html"]).iter("dd") if "fitaudit" in dd.text())
    assert "none recorded (an installed package, not a git checkout)" in tool.text()


def test_environment_escapes_and_is_strict():
    env = environment()
    assert env is environment()  # cached
    assert env.get_template("run.html.j2").environment.autoescape("run.html.j2") is True
    assert env.from_string("{{ x }}").render(x="<b>") == "&lt;b&gt;"
    with pytest.raises(jinja2.UndefinedError, match="'missing' is undefined"):
        env.from_string("{{ missing }}").render()


# ----------------------------------------------------------------------------------------------
# structure, method page, footer, sizes
# ----------------------------------------------------------------------------------------------
def _headings(root: Node, tag: str = "h2") -> list[str]:
    return [h.text().strip() for h in root.iter(tag)]


def test_page_structure(doc, pages, dom):
    n_exceptions = sum(m["verdict"] != "pass" for m in doc["models"])
    assert _headings(dom["index.html"]) == [
        "Summary",
        f"Exceptions ({n_exceptions})",
        "Movement since the previous audit",
        "All models: status over the last 8 audits",
    ]
    run = pages["index.html"].decode("utf-8")
    assert (
        run.index('id="counts"')
        < run.index('id="false-flags"')
        < run.index('id="exceptions"')
        < run.index('id="movement"')
        < run.index('id="trail"')
    )
    audited = next(m for m in doc["models"] if m["verdict"] == "respecify")
    assert _headings(dom[f"models/{audited['safe_id']}.html"]) == [
        "Verdict and reasons",
        "Production check and refit check",
        "Divergence map",
        "Residual diagnostics",
        "Parameters: production versus refit",
        "Change point",
        "Candidate specifications",
        "History of the standardised maximum",
        "Data lineage",
        "Settings used",
    ]
    assert _headings(dom["models/entry-7.html"]) == [
        "Verdict and reasons",
        "No audit ran",
        "Candidate specifications",
        "History of the standardised maximum",
        "Data lineage",
        "Settings used",
    ]
    for kind in ("production", "refit"):
        for fig in ("map", "hist", "qq", "acf"):
            assert dom[f"models/{audited['safe_id']}.html"].find_id(f"figure-{fig}-{kind}") is not None
    assert render_run(doc, META) == pages  # deterministic


def test_change_point_and_parameters_are_shown(doc, dom):
    m = next(m for m in doc["models"] if m["audit"] and m["audit"]["change"])
    section = dom[f"models/{m['safe_id']}.html"].find_id("change")
    # dates, not positions: the change's first error, counted back from the as-of date of a daily series
    n = m["lineage"]["extract"]["rows"]
    date = (dt.date(2026, 11, 30) - dt.timedelta(days=n - 1 - m["audit"]["change"]["index"])).isoformat()
    assert f"falls near {date} (the first error after it)" in section.text()
    assert "position" not in section.text()
    header, rows = table_rows(next(dom[f"models/{m['safe_id']}.html"].find_id("parameters").iter("table")))
    by_name = {cells[0]: cells for _, cells in rows}
    for name, value in m["audit"]["production_params"].items():
        assert printed_matches(by_name[name][header.index("Production")], value)
        assert printed_matches(by_name[name][header.index("Refit")], m["audit"]["fitted"]["params"][name])


def test_method_page_explains_with_formulas_references_and_cautions(dom):
    method = dom["method.html"].text()
    for ref in (
        "Stummer, W. and Vajda, I. (2012)",
        "Cressie, N. and Read, T. R. C. (1984)",
        "Ljung, G. M. and Box, G. E. P. (1978)",
        "McLeod, A. I. and Li, W. K. (1983)",
        "Nikulin, M. S. (1973)",
        "Rao, K. C. and Robson, D. S. (1974)",
        "Benjamini, Y. and Hochberg, Y. (1995)",
    ):
        assert ref in method
    for formula in (
        "Q(h) = n (n + 2)",
        "R = maxg Tg / cg",
        "T = 2 n Bφα(P, Q | Mβ)",
        "p = ( 1 + #{ b : R*b ≥ R } ) / ( B + 1 )",
    ):
        assert formula in method, formula
    assert "statistical evidence, not proof that a model is fit for its use" in method
    policy = dom["method.html"].find_id("policy").text()
    assert "model-risk committee" in policy and "Level q of the adjusted p-values0.1" in policy
    assert "fdr_q" not in policy and "multiple_testing" not in policy  # words, not the registry's keys


def test_every_page_carries_the_caution_in_its_footer(dom):
    for name, root in dom.items():
        footer = next(root.iter("footer")).text()
        assert "A passing audit is statistical evidence, not proof that a model is fit for its use." in footer, name
        assert "model-risk policy, applicable regulation and the judgement of qualified reviewers" in footer, name


def test_model_pages_stay_under_150_kb(pages):
    sizes = {k: len(v) for k, v in pages.items() if k.startswith("models/")}
    assert max(sizes.values()) <= 150_000, sizes  # source: docs/architecture.md §4 (a model page at most 150 KB)


@pytest.mark.slow
def test_a_thousand_model_run_page_stays_under_2_mb(doc):
    audited = [m for m in doc["models"] if m["audit"]]
    records = []
    for k in range(1000):
        record = copy.deepcopy(audited[k % len(audited)])
        record["id"] = record["safe_id"] = f"fleet-{k:04d}-{record['id']}"
        records.append(record)
    fleet = build_results(
        as_of=AS_OF,
        registry={"path": "registry.yaml", "sha256": "ef" * 32},
        policy=POLICY,
        records=records,
        tool_version="0.1.0",
    )
    pages = render_run(json.loads(json.dumps(fleet)), META)
    assert len(pages) == 1002
    assert (
        len(pages["index.html"]) <= 2_000_000
    )  # source: docs/architecture.md §4 (the run page for 1,000 models at most 2 MB)
    assert (
        max(len(v) for k, v in pages.items() if k.startswith("models/")) <= 150_000
    )  # source: docs/architecture.md §4
    run = parse(pages["index.html"])
    assert len(list(next(run.find_id("trail").iter("tbody")).iter("tr"))) == 1000


def test_stale_sources_are_named_once_on_the_run_page(doc):
    models = [f"m-{k:02d}" for k in range(7)]
    stale = {
        "sales": {
            "uri": "/data/exports/2026-11-30/sales.parquet",
            "last": "2026-11-23T00:00:00Z",
            "as_of": "2026-11-30",
            "frequency": "D",
            "allowed": 1,
            "models": models,
        }
    }
    page = parse(render_run(doc, dict(META, stale_sources=stale))["index.html"])
    (para,) = [p for p in page.iter("p") if "stale-source" in p.classes()]
    said = para.text()
    assert said.count("Source sales") == 1 and "last observed on 2026-11-23" in said
    assert "before the as-of date 2026-11-30: 7 model(s)" in said and "m-04 and 2 more" in said and "m-05" not in said
    plain = render_run(doc, META)["index.html"].decode("utf-8")
    assert "stale-source" not in plain


# ----------------------------------------------------------------------------------------------
# archive index
# ----------------------------------------------------------------------------------------------
def test_archive_index_lists_published_runs(tmp_path, doc):
    root = tmp_path / "archive"
    run_ids = []
    for k, as_of in enumerate((dt.date(2026, 11, 23), dt.date(2026, 11, 30))):
        run_id = archive.new_run_id(as_of, dt.datetime(2026, 12, 1, 1, 0, k, tzinfo=dt.UTC))
        meta = dict(META, run_id=run_id)
        with archive.open_run(root, run_id, as_of.year) as run:
            for name, data in render_run(doc, meta).items():
                run.write_bytes(name, data)
            run.finish({"counts": {k: doc["summary"][k] for k in ("registered", "audited", *STATUS)}})
        run_ids.append(run_id)
    runs = archive.list_runs(root)
    runs.append(
        {
            "run_id": HOSTILE,
            "path": "../../etc",
            "as_of": "2026-12-07",
            "time": "t",
            "seq": 99,
            "counts": None,
            "purged": False,
            "signoffs": [],
            "manifest_sha256": "0" * 64,
        }
    )
    page = render_archive_index(runs)
    text = page.decode("utf-8")
    root_node = parse(page)
    _check_self_contained("index.html", root_node, text, {}, archive_links=True)
    header, rows = table_rows(table_by_caption(root_node, "Audit runs"))
    assert [cells[header.index("Run")] for _, cells in rows] == [HOSTILE] + run_ids[::-1]  # newest first
    links = [a.attrs["href"] for a in root_node.iter("a") if a.attrs["href"].startswith("runs/")]
    assert links == [f"runs/2026/{r}/index.html" for r in run_ids[::-1]]
    assert all((root / link).is_file() for link in links)
    for _, cells in rows[1:]:
        assert int(cells[header.index("Registered")]) == doc["summary"]["registered"]
        for verdict, (symbol, word) in STATUS.items():
            assert int(cells[header.index(f"{symbol} {word}")]) == doc["summary"][verdict]
    assert HOSTILE not in text and "A passing audit is statistical evidence" in text


def test_run_context_names_the_chain_head_the_previous_audit_and_the_trend(tmp_path):
    from fitaudit.tasks.publish import run_context

    root = tmp_path / "archive"
    empty = run_context(root, dt.date(2026, 11, 30))
    assert empty == {
        "archive_head": None,
        "chain_head": None,
        "chain_seq": 0,
        "previous_run_id": None,
        "previous_as_of": None,
        "fleet_trend": [],
    }
    published = []
    plan = [  # (as_of, kind, passed, registered, models requested)
        (dt.date(2026, 11, 2), "audit", 8, 10, None),
        (dt.date(2026, 11, 9), "audit", 9, 10, None),
        (dt.date(2026, 11, 9), "audit", 1, 1, ["m-1"]),  # a partial rerun: not in the trend, but the previous run
        (dt.date(2026, 11, 9), "refit", None, None, None),  # a refit run is never the previous audit
        (dt.date(2026, 12, 7), "audit", 10, 10, None),  # after the new run's as-of date: not in its trend
    ]
    for k, (as_of, kind, passed, registered, requested) in enumerate(plan):
        run_id = archive.new_run_id(as_of, dt.datetime(2026, 12, 1, 1, 0, k, tzinfo=dt.UTC))
        with archive.open_run(root, run_id, as_of.year) as run:
            if kind == "audit":
                run.write_bytes("results.json", b"{}")
                manifest = {
                    "kind": "audit",
                    "counts": {"registered": registered, "pass": passed},
                    "scope": {"models_requested": requested},
                }
            else:
                run.write_bytes("refit.json", b"{}")
                manifest = {"kind": "refit", "counts": {"promoted": 1}}
            published.append(run.finish(manifest))
    context = run_context(root, dt.date(2026, 11, 30))
    head, seq = archive.chain_head(root)
    assert context["archive_head"] == f"{head} (seq {seq})" and context["chain_seq"] == seq == len(plan)
    assert (
        context["previous_run_id"] == published[4].run_id and context["previous_as_of"] == "2026-12-07"
    )  # the audit published last
    assert context["fleet_trend"] == [
        {"as_of": "2026-11-02", "passed": 8, "registered": 10},
        {"as_of": "2026-11-09", "passed": 9, "registered": 10},
    ]
    assert run_context(root, dt.date(2026, 11, 30), trend_length=1)["fleet_trend"] == [
        {"as_of": "2026-11-09", "passed": 9, "registered": 10}
    ]


def test_run_page_names_the_chain_head_and_the_previous_run(doc):
    head = "ab" * 32 + " (seq 12)"
    page = parse(
        render_run(
            doc, dict(META, archive_head=head, previous_run_id="20261123-T010203Z-0a0b", previous_as_of="2026-11-23")
        )["index.html"]
    )
    facts = next(page.iter("dl")).text()
    assert head in facts and "20261123-T010203Z-0a0b (as of 2026-11-23)" in facts
    first = parse(render_run(doc, META)["index.html"])
    facts = next(first.iter("dl")).text()
    assert (
        "none: this is the first entry of the archive’s hash chain" in facts
        and "none: the first audit run in this archive" in facts
    )


# ----------------------------------------------------------------------------------------------
# the reviewer's view: actions, thresholds, plain words, partial runs, the fleet's trend
# ----------------------------------------------------------------------------------------------
def test_exceptions_say_what_to_do_and_by_when(doc, dom):
    from fitaudit.core.verdict import owner_action

    table = next(dom["index.html"].find_id("exceptions").iter("table"))
    header, rows = table_rows(table)
    expected = sorted((m for m in doc["models"] if m["verdict"] != "pass"), key=lambda m: (m["severity"], m["id"]))
    defaults = {
        1: 7,
        2: 14,
        3: 28,
    }  # source: the registry schema's default days to act per tier (tasks/registry/schema.py DaysToAct)
    for (_, cells), m in zip(rows, expected):
        days = defaults.get(m["tier"], 7)  # an entry without a tier gets the shortest
        due = (dt.date(2026, 11, 30) + dt.timedelta(days=days)).isoformat()
        action = cells[header.index("Action")]
        assert action.startswith(owner_action(m["verdict"], escalated=m["escalated"])["action"]) and action.endswith(
            f"By {due}."
        )
        assert "promot" not in action or (m["verdict"] == "refit" and not m["escalated"])
    legend = dom["index.html"].find_id("tier-legend").text()
    assert (
        "from 1 (most material) to 3" in legend
        and "7 days to act on an exception of a tier-1 model, 14 of tier 2 and 28 of tier 3" in legend
    )
    refit = next(m for m in doc["models"] if m["verdict"] == "refit")
    box = dom[f"models/{refit['safe_id']}.html"].find_id("action").text()
    assert "approve their promotion" in box and "By 2026-12-14 (14 days after the as-of date" in box


def test_days_to_act_come_from_the_policy(doc):
    strict = copy.deepcopy(doc)
    strict["run"]["policy"]["days_to_act"] = {"tier_1": 3, "tier_2": 5, "tier_3": 9}
    page = parse(render_run(strict, META)["index.html"])
    header, rows = table_rows(next(page.find_id("exceptions").iter("table")))
    tier2 = [cells for _, cells in rows if cells[header.index("Tier")] == "2"]
    assert tier2 and all(c[header.index("Action")].endswith("By 2026-12-05.") for c in tier2)  # 30 November + 5 days
    assert (
        "3 days to act on an exception of a tier-1 model, 5 of tier 2 and 9 of tier 3"
        in page.find_id("tier-legend").text()
    )


def test_check_table_puts_thresholds_and_floors_beside_the_p_values(doc, dom):
    shown = 0
    for m in doc["models"]:
        for kind, column in (("production", 0), ("refit", 1)):
            check = (m["audit"] or {}).get(kind)
            if not check or check["status"] != "ok":
                continue
            _, rows = table_rows(next(dom[f"models/{m['safe_id']}.html"].find_id("checks").iter("table")))
            cell = {cells[0]: cells[1:][column] for _, cells in rows}
            floor = 1 / (
                check["calibration"]["replicates"] + 1
            )  # source: docs/method.md §7 (p = (1 + #{R* >= R}) / (B + 1))
            assert cell["Smallest possible p of the distribution gate"].startswith(f"p ≥ {floor:g} (1 / (199 + 1)")
            at_floor = check["p_distribution"] <= floor * (1 + 1e-9)
            assert ("(the smallest possible with 199 simulations" in cell["p, distribution gate"]) == at_floor
            assert (
                cell["Threshold of each gate (unadjusted)"]
                == "fails at p ≤ 0.025 (level 0.05 split over the two gates)"
            )
            verdict = "fails" if check["p_adjusted"] <= POLICY["fdr_q"] else "passes"
            assert cell["p, adjusted across the run"].endswith(
                f"(the run's rule: the check fails at ≤ q = 0.1, Benjamini-Hochberg; it {verdict})"
            )
            assert cell["Window"].endswith(
                f"to 2026-11-30 ({check['window']['length']} observations)"
            )  # dates, not positions
            shown += 1
    assert shown >= 6


def test_reviewer_pages_show_words_not_internals(pages, dom):
    internals = re.compile(
        r"\b(?!T_max\b)[A-Za-z0-9]+_[A-Za-z0-9_]+\b|\bNone\b|\bTrue\b|\bFalse\b|shape=|\{'|\[\[|'line'"
    )
    for name, root in dom.items():
        text = next(root.iter("main")).text()
        found = internals.findall(text)
        assert not found, (name, found[:5])  # no registry keys, Python reprs or table keys
    policy = [tr for tr, _ in table_rows(dom["method.html"].find_id("policy"))[1]]
    assert not any(
        tr.elements()[0].text().strip().lower() == "line" for tr in policy
    )  # the registry's line number is bookkeeping
    assert internals.search("fit_window None") and internals.search("{'a': 1}")  # the pattern does catch internals


def test_partial_runs_say_their_p_values_were_adjusted_over_fewer_checks(doc):
    full = parse(render_run(doc, META)["index.html"])
    assert full.find_id("partial-run") is None
    partial = parse(
        render_run(
            doc, dict(META, scope={"models_requested": 7, "registry_models": 45, "unreadable_sources": ["sensors"]})
        )["index.html"]
    )
    text = partial.find_id("partial-run").text()
    assert "only 7 of the registry's 45 models were audited (--models)" in text and "the source(s) sensors" in text
    assert (
        f"adjusted over the {doc['summary']['checks']} checks that ran" in text
        and "the same model can pass in the full run and be flagged in this one" in text
    )


def test_run_page_has_a_one_line_fleet_trend(doc):
    trend = [
        {"as_of": "2026-11-16", "passed": 4, "registered": 8},
        {"as_of": "2026-11-23", "passed": 6, "registered": 8},
    ]
    page = parse(render_run(doc, dict(META, fleet_trend=trend))["index.html"])
    line = page.find_id("fleet-trend")
    now = 100 * doc["summary"]["pass"] / doc["summary"]["registered"]
    assert f"2026-11-16 50 % → 2026-11-23 75 % → 2026-11-30 {now:.0f} %" in line.text()  # 4 / 8, 6 / 8
    svg = next(line.iter("svg"))
    assert "2026-11-23: 6 of 8 (75 %)" in svg.find_id("fleet-trend-d").text() and len(list(svg.iter("circle"))) == 3
    assert parse(render_run(doc, META)["index.html"]).find_id("fleet-trend") is None  # a first audit has no trend


def test_passes_with_a_caution_are_listed_to_watch(doc):
    watched = copy.deepcopy(doc)
    target = next(m for m in watched["models"] if m["verdict"] == "pass")
    target["reasons"].append(
        "Caution, production check: it passes narrowly: its largest standardised statistic is 0.97 of its critical "
        "value (within 10 % of failing)."
    )
    page = parse(render_run(watched, META)["index.html"])
    items = [li.text() for li in next(page.find_id("exceptions").iter("ul")).iter("li")]
    assert len(items) == 1 and items[0].startswith(target["id"]) and "0.97 of its critical value" in items[0]

"""The review pack: self-contained HTML with grades, findings, prompts, cautions and static charts."""

from __future__ import annotations

import base64
import html
from html.parser import HTMLParser

import pytest

from tracker.ui import theme


class _Collect(HTMLParser):
    def __init__(self):
        super().__init__()
        self.tags: list[str] = []
        self.urls: list[tuple[str, str, str]] = []
        self.images: list[str] = []

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)
        for name, value in attrs:
            if name in ("src", "href", "action", "data", "poster") and value is not None:
                self.urls.append((tag, name, value))
            if tag == "img" and name == "src":
                self.images.append(value)


@pytest.fixture
def pack(shared_engine, demo_graded):
    from tracker.db import queries
    from tracker.ui.review_pack import build_pack

    pk, kin = queries.pk(shared_engine), queries.kinetics(shared_engine)
    rich = sorted(set(pk["compound"]) & set(kin["compound"]))[0]  # kinetics and PK: incubation and engagement charts
    fitted = queries.time_courses(shared_engine)["compound"].iloc[0]  # a stored fit
    names = [rich, fitted]
    graded = [demo_graded[n] for n in names]
    text = build_pack(shared_engine, compounds=names, author="demo-lead", graded=list(demo_graded.values()))
    return text, names, graded


def test_the_pack_has_no_scripts_styles_or_links_from_elsewhere(pack):
    text, _, _ = pack
    p = _Collect()
    p.feed(text)
    assert not {"script", "link", "iframe", "object", "embed"} & set(p.tags)
    assert all(value.startswith(("data:", "#")) for _, _, value in p.urls), p.urls
    assert "http://" not in text and "https://" not in text
    assert "@import" not in text and "url(" not in text


def test_every_chart_is_an_embedded_svg_image(pack):
    text, names, _ = pack
    p = _Collect()
    p.feed(text)
    # summary chart + per compound: incubation chart, engagement chart (rich) and one chart per stored fit
    assert len(p.images) >= 4
    for src in p.images:
        head, data = src.split(",", 1)
        assert head == "data:image/svg+xml;base64"
        svg = base64.b64decode(data).decode("utf-8")
        assert svg.lstrip().startswith("<svg") and "</svg>" in svg


def test_the_pack_carries_grades_findings_prompts_cautions_and_the_safety_text(pack):
    text, names, graded = pack
    for point in theme.SAFETY_POINTS:
        assert point.replace("'", "&#x27;") in text
    for g in graded:
        assert g["compound"] in text
        assert theme.grade_label(g["grade"]) in text
        for f in g["findings"]:
            assert html.escape(f["prompt"]) in text
            if f.get("caution"):
                assert html.escape(f["caution"]) in text


def test_the_pack_records_the_audit_chain_head_it_was_built_from(pack, shared_engine):
    from tracker.db.audit import chain_head
    from tracker.db.uow import UnitOfWork

    text, _, _ = pack
    with UnitOfWork(shared_engine, write=False) as uow:
        head_id, head_hash = chain_head(uow.session)
    assert f"event {head_id}, hash <code class='audit-head'>{head_hash}</code>" in text  # the whole hash, for --expect-head
    assert f"<meta name='krt-audit-head' content='{head_hash}' data-events='{head_id}'>" in text


def test_a_large_selection_keeps_grades_but_leaves_out_per_compound_charts(shared_engine, demo_graded, monkeypatch):
    from tracker.ui import review_pack

    monkeypatch.setattr(review_pack, "MAX_CHART_COMPOUNDS", 3)
    text = review_pack.build_pack(shared_engine, program="Quillmere", graded=list(demo_graded.values()))
    quillmere = [n for n, g in demo_graded.items() if g["program"] == "Quillmere"]
    assert all(n in text for n in quillmere)
    assert text.count("<img") == 1  # only the summary chart
    assert "charts and potency tables are left out above 3" in text
    for g in demo_graded.values():
        if g["program"] == "Quillmere":
            for f in g["findings"]:
                assert html.escape(f["prompt"]) in text

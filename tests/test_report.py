"""Tests of ntrans.report: self-contained HTML, embedded images, escaped values, cautions."""

from __future__ import annotations

import base64
import html
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest

from ntrans import report
from ntrans.cautions import CAUTIONS
from ntrans.translate import FLAG_MEANINGS

# Smallest valid PNG: 1 x 1 pixel (bytes written out by hand, not from a plotting library).
PNG_1PX = base64.b64decode(
    "iVBORw0KGgoAAAANSUhEUgAAAAEAAAABCAYAAAAfFcSJAAAADUlEQVR42mNk+M9QDwADhgGAWjR9awAAAABJRU5ErkJggg=="
)


class _Collector(HTMLParser):
    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.tags: list[str] = []
        self.attrs: list[tuple[str, str, str | None]] = []
        self.text: list[str] = []
        self.open: list[str] = []
        self.errors: list[str] = []

    VOID = {"meta", "img", "br", "hr", "link", "input"}

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)
        self.attrs.extend((tag, k, v) for k, v in attrs)
        if tag not in self.VOID:
            self.open.append(tag)

    def handle_endtag(self, tag):
        if not self.open or self.open[-1] != tag:
            self.errors.append(f"unbalanced </{tag}> (open: {self.open[-3:]})")
        else:
            self.open.pop()

    def handle_data(self, data):
        self.text.append(data)


def _context(**extra):
    ctx = {
        "title": "Demo & test",
        "project": "demo.toml",
        "move": {"source": "flat", "target": "subgrid", "closure": "lumped",
                 "composite": "horton_einstein", "window": "depths 0.25:3:0.25"},
        "units": {"horizontal": "metre", "vertical": "metre", "manning_k": 1.0},
        "counts": {"cells": 9, "faces": 24, "stages": 12},
        "classes": [
            {"class": "grass", "n_source": 0.03, "n_target": 0.026, "ratio": 0.8667,
             "ratio_p10": 0.8, "ratio_p50": 0.87, "ratio_p90": 0.95, "faces": 20,
             "weight_share": 0.75, "flags": ""},
            {"class": "<script>alert(1)</script>", "n_source": 0.06, "n_target": float("nan"),
             "ratio": float("nan"), "faces": 4, "weight_share": 0.25, "flags": "dry_in_target"},
        ],
        "bias": {"before": {"median": 0.21, "p10": 0.1, "p90": 0.3, "mean_abs": 0.2, "count": 288},
                 "after": {"median": 0.0, "p10": -0.02, "p90": 0.02, "mean_abs": 0.01, "count": 288}},
        "inputs": [{"role": "dem", "path": "/data/dem.tif", "sha256": "ab" * 32}],
        "notes": ["3 faces wet in one family only were left out"],
    }
    ctx.update(extra)
    return ctx


@pytest.fixture
def rendered():
    images = {key: PNG_1PX for key in ("friction_factor", "n_ratio", "stage_bias",
                                       "stage_bias_hist", "class_ratios", "cell_curves")}
    text = report.render_report(_context(), images)
    parser = _Collector()
    parser.feed(text)
    parser.close()
    return text, parser


def test_report_parses_as_balanced_html(rendered):
    text, parser = rendered
    assert text.startswith("<!DOCTYPE html>")
    assert parser.errors == []
    assert parser.open == []
    assert "html" in parser.tags and "body" in parser.tags and "table" in parser.tags


def test_report_embeds_every_image_as_a_data_uri(rendered):
    _, parser = rendered
    sources = [v for tag, k, v in parser.attrs if tag == "img" and k == "src"]
    assert len(sources) == 6
    for src in sources:
        assert src.startswith("data:image/png;base64,")
        assert base64.b64decode(src.split(",", 1)[1]) == PNG_1PX


def test_report_links_nothing_outside_the_file(rendered):
    text, parser = rendered
    assert "script" not in parser.tags
    assert "link" not in parser.tags
    for _tag, key, value in parser.attrs:
        if key in ("src", "href", "action", "data"):
            assert value is not None and not value.lower().startswith(("http:", "https:", "//"))
    assert "http://" not in text and "https://" not in text
    assert "@import" not in text and "url(" not in text


def test_report_escapes_values(rendered):
    text, parser = rendered
    assert "<script>" not in text
    assert html.escape("<script>alert(1)</script>") in text
    assert "Demo &amp; test" in text


def test_report_states_the_cautions_verbatim_twice(rendered):
    text, _ = rendered
    for caution in CAUTIONS:
        assert text.count(html.escape(caution)) == 2


def test_report_holds_class_table_and_sources(rendered):
    text, parser = rendered
    body = " ".join(parser.text)
    assert "grass" in body and "0.026" in body and "0.8667" in body
    assert "75 %" in body  # weight share shown as a percentage
    for source in ("Chow (1959)", "Horn 1981", "Horton", "Pavlovskii", "Lotter"):
        assert source in body


@pytest.mark.parametrize(
    ("flags", "explained", "not_explained"),
    [
        ("wide_spread;dry_wet_mismatch:12", ["wide_spread", "dry_wet_mismatch:N"],
         ["at_bound", "not_fitted"]),
        ("not_fitted;few_faces", ["not_fitted", "few_faces"], ["wide_spread"]),
        ("", [], list(FLAG_MEANINGS)),
    ],
)
def test_report_explains_the_flags_it_shows(flags, explained, not_explained):
    row = {"class": "grass", "n_source": 0.03, "n_target": 0.03, "ratio": 1.0, "flags": flags}
    text = report.render_report(_context(classes=[row]), {})
    parser = _Collector()
    parser.feed(text)
    assert parser.errors == []
    for name in explained:
        assert f"<dt><code>{name}</code></dt>" in text
        assert html.escape(FLAG_MEANINGS[name.split(":")[0]]) in text
    for name in not_explained:
        assert f"<dt><code>{name}" not in text


def test_every_flag_of_the_fit_is_explained_in_the_readme():
    # the flags the class fit writes (ntrans.translate.fit_class_n) against the README's list
    readme = (Path(__file__).resolve().parents[1] / "README.md").read_text(encoding="utf-8")
    assert set(FLAG_MEANINGS) == {"not_fitted", "few_faces", "wide_spread",
                                  "outside_published_range", "dry_wet_mismatch", "at_bound"}
    for name in FLAG_MEANINGS:
        assert f"- `{name}" in readme, name


def test_report_skips_missing_images_and_empty_classes():
    text = report.render_report(_context(classes=[], bias={}), {})
    parser = _Collector()
    parser.feed(text)
    assert "img" not in parser.tags
    assert parser.errors == []
    assert "No roughness classes" in text


@pytest.mark.parametrize(
    ("value", "text"),
    [(12345, "12345"), (np.int64(12345), "12345"), (0.0123456, "0.01235"), (float("nan"), "&mdash;"),
     (None, "&mdash;"), ("a<b", "a&lt;b"), (True, "True")],
)
def test_fmt_keeps_integers_whole_and_escapes_text(value, text):
    assert report.fmt(value) == text


def test_write_report_writes_utf8(tmp_path):
    path = report.write_report(tmp_path / "r" / "report.html", _context(), {"n_ratio": PNG_1PX})
    assert path.read_text(encoding="utf-8").count("data:image/png;base64,") == 1


def _text_of(html_text: str) -> str:
    parser = _Collector()
    parser.feed(html_text)
    parser.close()
    return " ".join(" ".join(parser.text).split())


ALL_IMAGES = ("friction_factor", "n_ratio", "stage_bias", "stage_bias_hist", "class_ratios",
              "cell_curves")


@pytest.mark.parametrize(("fit_domain", "item", "other"), [("faces", "face", "cell"),
                                                           ("cells", "cell", "face")])
def test_report_labels_name_the_items_of_the_fit_domain(fit_domain, item, other):
    ctx = _context(fit_domain=fit_domain)
    text = _text_of(report.render_report(ctx, dict.fromkeys(ALL_IMAGES, PNG_1PX)))
    assert f"{item}-stages" in text and f"{other}-stages" not in text
    assert f"Spread over {item}s and stages" in text
    assert f"per {item} and stage of the window" in text
    assert f"across the {item}s of each class" in text
    assert f"Stage errors are medians over the class's {item}s and stages" in text
    # the class table's count column is headed by what it counts
    head = report.render_report(ctx, {}).split("<thead>")[1].split("</thead>")[0]
    assert f">{item}s</th>" in head and f">{other}s</th>" not in head
    if fit_domain == "cells":  # the per-cell maps are the cell's own figures
        assert "of its faces" not in text and "over its faces" not in text
        assert "the median over the window of the cell's own stage error" in text
        assert "the median over the window of the cell's own ratio" in text
    else:
        assert "the median over the window and over its faces of the ratio" in text


def test_report_says_what_the_window_stages_and_table_levels_are():
    ctx = _context(counts={"cells": 9, "faces": 24,
                           "stages": "1 (one per water-surface raster)",
                           "table_stages": "8 depths"})
    text = _text_of(report.render_report(ctx, {}))
    assert "stages per face and cell in the window 1 (one per water-surface raster)" in text
    assert "levels of the stage tables 8 depths" in text
    assert "stages per item" not in text

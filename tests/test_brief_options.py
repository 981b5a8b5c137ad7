"""Briefing options: headline, summary box, forecaster line, choice and order of pages."""
from __future__ import annotations

import subprocess
import shutil

import pytest
from pypdf import PdfReader

from workbench.brief import PAGES, briefing_pages, briefing_texts, make_briefing
from workbench.cli import main as pvwb
from workbench.errors import InputError

HEADLINE = "Rapid deepening: 15 hPa in 12 h, $100 \\alpha$ {x} <b>kept</b>"
SUMMARY = ("Upper trough ($\\sigma$ > 2 PVU) overtakes the warm surface anomaly.\n"
           "Second paragraph: 50 % & more; back\\slash and ^carets_ stay as typed.")


def _texts(path):
    return [" ".join(p.extract_text().split()) for p in PdfReader(path).pages]


def test_title_page_texts_and_page_order(small_case, tmp_path):
    out = make_briefing(small_case, None, tmp_path / "b.pdf", headline=HEADLINE, summary=SUMMARY,
                        author="A. Forecaster", office="Invented Office North", pages=["attribution", "map"])
    pages = _texts(out)
    assert len(pages) == 3  # title, attribution, map
    title = pages[0]
    # plain text: dollar signs, backslashes and markup-like characters come out as typed
    assert " ".join(HEADLINE.split()) in title
    assert "Upper trough ($\\sigma$ > 2 PVU) overtakes the warm surface anomaly." in title
    assert "back\\slash and ^carets_ stay as typed" in title
    assert "Forecaster: A. Forecaster, Invented Office North" in title
    assert "Summary" in title
    assert "Attribution" in pages[1] or "attribution" in pages[1].lower()
    assert "Ertel PV" in pages[2] or "PVU" in pages[2]
    assert PdfReader(out).metadata.author == "A. Forecaster, Invented Office North"
    if shutil.which("pdftoppm"):  # the title page as an image for review
        from conftest import ARTIFACTS

        subprocess.run(["pdftoppm", "-r", "70", "-f", "1", "-l", "1", "-png", "-singlefile", str(out),
                        str(ARTIFACTS / "brief_title_options")], check=True)


def test_default_pages_and_title_only(small_case, tmp_path):
    assert briefing_pages() == ["map", "tropopause", "sections", "attribution"]
    assert briefing_pages(None, tendency=True) == [p for p in PAGES if p != "balance"]
    assert briefing_pages(None, tendency=True, balance="nonlinear") == list(PAGES)
    assert briefing_pages("attribution, map") == ["attribution", "map"]
    out = make_briefing(small_case, None, tmp_path / "t.pdf", pages=[])
    pages = _texts(out)
    assert len(pages) == 1 and "PV diagnosis briefing" in pages[0]
    assert "Forecaster:" not in pages[0] and "Summary" not in pages[0]


def test_long_summary_still_fits_above_the_caution(small_case, tmp_path):
    summary = "\n".join(f"Line {k}: " + "trough " * 12 for k in range(9))
    out = make_briefing(small_case, None, tmp_path / "s.pdf", headline="H", summary=summary, pages=[])
    text = _texts(out)[0]
    assert "Line 8:" in text and "not a forecast" in text


@pytest.mark.parametrize("kwargs, message", [
    (dict(pages=["map", "movie"]), "page 'movie' is unknown"),
    (dict(pages=["map", "map"]), "page 'map' is listed twice"),
    (dict(headline="two\nlines"), "headline contains a line break"),
    (dict(author="bell\x07"), "control character 0x07"),
    (dict(office=42), "office must be text"),
    (dict(summary="x" * 1501), "summary has 1501 characters"),
    (dict(summary="\n".join(["line"] * 11)), "summary fills 11 lines"),
])
def test_bad_options_refused_before_work(small_case, tmp_path, kwargs, message):
    with pytest.raises(InputError, match=message):
        make_briefing(small_case, None, tmp_path / "bad.pdf", **kwargs)
    assert not list(tmp_path.iterdir())


def test_cli_flags(small_case_path, tmp_path, capsys):
    summary_file = tmp_path / "summary.txt"
    summary_file.write_text("From a file: 10 $ per unit\nsecond line", encoding="utf-8")
    out = tmp_path / "cli.pdf"
    assert pvwb(["--quiet", "brief", str(small_case_path), "-o", str(out), "--headline", "Head $x$",
                 "--summary-file", str(summary_file), "--author", "B. Forecaster", "--office", "Desk 2",
                 "--pages", "attribution"]) == 0
    pages = _texts(out)
    assert len(pages) == 2
    assert "Head $x$" in pages[0] and "From a file: 10 $ per unit" in pages[0]
    assert "Forecaster: B. Forecaster, Desk 2" in pages[0]
    capsys.readouterr()
    assert pvwb(["brief", str(small_case_path), "-o", str(tmp_path / "x.pdf"), "--pages", "map,nope"]) == 2
    assert "page 'nope' is unknown" in capsys.readouterr().err
    assert pvwb(["brief", str(small_case_path), "-o", str(tmp_path / "x.pdf"),
                 "--summary-file", str(tmp_path / "missing.txt")]) == 2
    assert "cannot be read" in capsys.readouterr().err
    assert not (tmp_path / "x.pdf").exists()
    briefing_texts(headline=" padded ")  # whitespace is trimmed, not refused

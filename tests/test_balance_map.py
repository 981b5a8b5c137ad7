"""Where the two balances differ: the map of the speed of the nonlinear-balance minus the QG
balanced wind, from the command line (``pvwb invert --balance-check --balance-map FIG``), as a
figure and as a briefing page. Fixture cases are invented (tests/conftest.py)."""
from __future__ import annotations

import warnings

import numpy as np
import pytest
from pypdf import PdfReader

from workbench.brief import make_briefing
from workbench.cli import main as pvwb
from workbench.inversion.nonlinear import balance_quality
from workbench.views import static

from conftest import ARTIFACTS


@pytest.fixture
def quality(small_case):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return balance_quality(small_case, 0, floor=True)


def test_balance_difference_is_the_speed_of_the_wind_difference(small_case, quality):
    # a check of what is mapped, not of physics: the field is defined here as the speed of the
    # vector difference of the two balanced winds (their physics is checked against outside
    # references in tests/test_nonlinear_balance.py)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        nl = small_case.balanced_state(0, balance="nonlinear", floor=True)
        qg = small_case.balanced_state(0, balance="qg")
    expect = np.hypot(nl["u"].values - qg["u"].values, nl["v"].values - qg["v"].values)
    np.testing.assert_allclose(quality["balance_difference"].values, expect, rtol=1e-10, atol=1e-10)
    assert float(quality["balance_difference"].max()) > 0.0


def test_balance_map_figure_names_level_and_both_balances(small_case, quality):
    fig = static.balance_map_figure(quality, 480.0, small_case)  # nearest level: 500 hPa
    text = " ".join(static.figure_text(fig).split())
    k = int(np.argmin(np.abs(quality["pressure"].values - 50000.0)))
    assert "|nonlinear - QG balanced wind|" in text and "500 hPa" in text
    assert (f"RMS balanced - analysed wind: QG {float(quality['rms_difference_qg'][k]):.1f}, "
            f"nonlinear {float(quality['rms_difference_nonlinear'][k]):.1f} m/s") in text
    assert static.CAUTION.split(".")[0] in text
    static.save_figure(fig, ARTIFACTS / "balance_map.png", overwrite=True)
    with pytest.raises(Exception, match="balance_quality"):
        static.balance_map_figure(quality.drop_vars("balance_difference"))


def test_cli_writes_the_balance_map_and_refuses_it_without_the_check(small_case_path, tmp_path,
                                                                      capsys):
    fig = tmp_path / "where.png"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        rc = pvwb(["invert", str(small_case_path), "--time", "0", "--balance-check", "--floor",
                   "--balance-map", str(fig), "--quiet"])
    assert rc == 0 and fig.stat().st_size > 10_000
    assert f"wrote {fig}" in capsys.readouterr().out
    rc = pvwb(["invert", str(small_case_path), "--balance-map", str(tmp_path / "x.png")])
    assert rc == 2 and "--balance-map needs --balance-check" in capsys.readouterr().err
    rc = pvwb(["invert", str(small_case_path), "--time", "0", "--balance-check",
               "--balance-map", str(tmp_path / "x.txt")])
    err = capsys.readouterr().err
    assert rc != 0 and "--balance-map" in err and "must end in .png or .pdf or .svg" in err
    assert not (tmp_path / "x.txt").exists()


def test_nonlinear_briefing_has_the_balance_page(small_case, tmp_path):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        out = make_briefing(small_case, None, tmp_path / "b.pdf", balance="nonlinear", floor=True,
                            pages=None)
    pages = [" ".join(p.extract_text().split()) for p in PdfReader(out).pages]
    assert any("|nonlinear - QG balanced wind|" in p for p in pages)
    qg = make_briefing(small_case, None, tmp_path / "q.pdf", pages=None)
    assert len(PdfReader(qg).pages) == len(pages) - 1


def test_page_balance_quality_shows_table_and_map(small_case):
    from workbench.panels.attribution import AttributionPanel
    from workbench.state import State

    st = State(small_case)
    st.balance_floor = True
    panel = AttributionPanel(st)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        job = panel.show_quality()
    assert job.state == "done", st.status
    assert panel.quality_table.visible and len(panel.quality_table.value) == small_case.levels_hpa.size
    assert panel.quality_map.visible and panel.quality_map.object[:8] == b"\x89PNG\r\n\x1a\n"
    (ARTIFACTS / "app_balance_map.png").write_bytes(panel.quality_map.object)
    st.time_index = 1  # another time: the read-out of the old one is hidden
    assert not panel.quality_map.visible and not panel.quality_table.visible

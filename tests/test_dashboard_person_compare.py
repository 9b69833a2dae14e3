"""The person page's comparison with the team or a colleague and its weight-history
downloads, run with Streamlit's AppTest on the demo store."""

from __future__ import annotations

import csv
import io

import pytest
from helpers.demo_store import build_demo_store
from helpers.monthly_demo import run_page

from monitor.config import load_config
from monitor.dashboard.person import comparison, comparison_tables, weights_file
from monitor.refit.compare import compare


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    return build_demo_store(tmp_path_factory.getbasetemp() / "demo_seed7")


def test_person_page_compares_with_the_rest_of_the_team(demo, monkeypatch):
    at = run_page(demo, monkeypatch, "page_person.py")
    who = at.selectbox(key="who").value
    texts = " ".join(m.value for m in at.markdown)
    assert "Compared with the team or a colleague" in " ".join(h.value for h in at.subheader)
    assert "against **team" in texts and f"without {who}" in texts
    # The table shown is the CLI's comparison (reference: `cuewatch compare` figures).
    cfg = load_config(demo)
    expected = compare(cfg, who)
    shown = at.dataframe[1].value
    latest = expected.window()
    assert list(shown["cue"]) == [c["cue"] for c in latest["cues"]]
    assert list(shown["difference"]) == pytest.approx(
        [c["difference"] for c in latest["cues"]], nan_ok=True
    )
    captions = " ".join(c.value for c in at.caption)
    assert "Test of each difference" in captions and "se1" in captions
    at.selectbox(key="compare_with").set_value("H002" if who != "H002" else "H003").run()
    assert not at.exception
    assert "against **H00" in " ".join(m.value for m in at.markdown)


def test_weight_history_download_is_the_cli_table(demo):
    cfg = load_config(demo)
    data = weights_file(cfg, "H004", "csv").decode()
    rows = list(csv.DictReader(io.StringIO(data)))
    assert rows and {r["decision_maker"] for r in rows} == {"H004"}
    assert weights_file(cfg, "H004", "xlsx")[:2] == b"PK"  # a zip container (XLSX)
    weights, lens = comparison_tables(comparison(cfg, "H004", "H001"))
    assert len(lens) == len(compare(cfg, "H004", "H001").windows) and len(weights) == len(
        cfg.design_columns()
    )

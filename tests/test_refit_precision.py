"""One extreme value and lost digits (issue #13, item 1b and 1c), through the real
command line into real DuckDB files.

(b) The bucket sums are taken around a per-decision-maker reference (``bucket_shifts``).
It is the median of their rows, so one absurd value cannot drag it away from every
other row: windows that do not contain the value are fitted exactly as if the value
were ordinary (checked against statsmodels OLS on the stored rows).  A magnitude beyond
``[ingest] max_magnitude`` (default 1e15) with no range of its own is quarantined.
(c) A window whose shifted sums lost too many digits to cancellation is refitted from
its raw rows (method 'qr') and agrees with statsmodels to 1e-9.
"""

from __future__ import annotations

import pytest
import statsmodels.api as sm
from helpers.cli import ingest_json, run_cli, text
from helpers.configs import make_config
from helpers.files import varied_decision, write_csv
from helpers.store_rows import design_frame, query, read_store

from monitor.config import load_config


def _row(i: int, day: str, **fields) -> dict:
    """A decision of handler h{i % 2} on ``day`` with varied cues and judgment
    (tests/helpers/files.py)."""
    when = {"handler": f"h{i % 2}", "decided": f"{day} {8 + i % 10:02d}:{i % 60:02d}:00"}
    return varied_decision(i, 7000, **{**when, **fields})


def _config(tmp_path, **overrides):
    cfg = make_config(
        tmp_path, windows={"length_days": 28, "step_days": 7, "min_rows": 10}, **overrides
    )
    assert run_cli(cfg, "init").returncode == 0
    return cfg


def _run(cfg, *args) -> None:
    proc = run_cli(cfg, *args)
    assert proc.returncode == 0, text(proc)


def _two_months(tmp_path, cfg, name: str, **special) -> None:
    """60 decisions in January 2024 and 60 in July 2024 (no 28-day window holds both);
    ``special`` overrides fields of decision 4 (h0, January)."""
    rows = [_row(i, f"2024-01-{1 + i % 28:02d}") for i in range(60)]
    rows += [_row(i, f"2024-07-{1 + i % 28:02d}") for i in range(60, 120)]
    rows[4] = {**rows[4], **special}
    write_csv(tmp_path / name, rows)
    assert ingest_json(cfg, "--kind", "decisions", str(tmp_path / name))["accepted"] == 120


def _fits(cfg) -> dict:
    df = read_store(
        cfg,
        "SELECT f.scope, f.decision_maker, f.window_start, f.window_end, f.method, "
        "f.n_decisions, f.R_s, w.cue, w.weight FROM fits f JOIN cue_weights w "
        "USING (scope, decision_maker, window_end) WHERE w.estimable",
    )
    out: dict = {}
    for r in df.itertuples():
        key = (r.scope, r.decision_maker, str(r.window_end))
        out.setdefault(key, {"start": r.window_start, "method": r.method, "R_s": r.R_s})
        out[key][r.cue] = r.weight
    return out


def _statsmodels(cfg, maker: str, start, end) -> dict[str, float]:
    """Reference: statsmodels OLS of the judgment on the design columns over the stored
    rows of ``maker`` decided in [start, end]."""
    rows = read_store(
        cfg,
        "SELECT * FROM decisions WHERE decision_maker = ? AND decided_day BETWEEN ? AND ?",
        [maker, start, end],
    )
    x = design_frame(load_config(cfg), rows)
    x = x.loc[:, x.std() > 0]
    fit = sm.OLS(rows["judgment"].astype(float), sm.add_constant(x)).fit()
    return {c: float(fit.params[c]) for c in x.columns}


def _july(key) -> bool:
    return key[2] >= "2024-07-01" and key[2] <= "2024-08-31"


# --- (b) one extreme value -------------------------------------------------------------------


def test_an_absurd_magnitude_is_quarantined_with_its_own_reason(tmp_path):
    cfg = _config(tmp_path)
    write_csv(tmp_path / "d.csv", [_row(1, "2024-01-02"), _row(2, "2024-01-02", age_days="1e200")])
    doc = ingest_json(cfg, "--kind", "decisions", str(tmp_path / "d.csv"))
    assert (doc["accepted"], doc["quarantine_reasons"]) == (1, {"implausible_magnitude": 1})
    (message,) = query(cfg, "SELECT message FROM quarantine")[0]
    assert message == "age_days='1e200' is larger in magnitude than 1e+15 ([ingest] max_magnitude)"
    # The bound is a setting: raised, the value is taken (a cue with a range uses its
    # range instead).
    raised = _config(tmp_path / "raised", ingest={"settle_seconds": 0, "max_magnitude": 1e100})
    write_csv(tmp_path / "d2.csv", [_row(3, "2024-01-02", age_days="1e20")])
    assert ingest_json(cfg, "--kind", "decisions", str(tmp_path / "d2.csv"))["accepted"] == 0
    assert ingest_json(raised, "--kind", "decisions", str(tmp_path / "d2.csv"))["accepted"] == 1
    doc = ingest_json(raised, "--kind", "decisions", str(tmp_path / "d.csv"))
    assert doc["quarantine_reasons"] == {"implausible_magnitude": 1}  # 1e200 > 1e100
    proc = run_cli(make_config(tmp_path / "bad", ingest={"max_magnitude": 1e200}), "init")
    assert proc.returncode == 2 and "max_magnitude" in text(proc)[1]


def test_one_extreme_value_affects_only_the_windows_that_contain_it(tmp_path):
    settings = {"ingest": {"settle_seconds": 0, "max_magnitude": 1e100}}
    absurd = _config(tmp_path / "absurd", **settings)
    plain = _config(tmp_path / "plain", **settings)
    _two_months(tmp_path / "absurd", absurd, "d.csv", age_days="1e12")
    _two_months(tmp_path / "plain", plain, "d.csv")
    for cfg in (absurd, plain):
        _run(cfg, "refit", "--full")
    with_value, without = _fits(absurd), _fits(plain)
    assert with_value.keys() == without.keys()
    july = [k for k in with_value if _july(k)]
    assert len(july) >= 6  # h0, h1, the teams and 'all' over several July windows
    for key in july:
        a, b = with_value[key], without[key]
        assert a.keys() == b.keys(), key  # every cue estimable in both
        for fig, value in b.items():
            if fig not in ("start", "method"):
                assert a[fig] == pytest.approx(value, rel=1e-9, abs=1e-12), (key, fig)
        if key[0] == "decision_maker":
            ref = _statsmodels(absurd, key[1], a["start"], key[2])
            for cue, w in ref.items():
                assert a[cue] == pytest.approx(w, rel=1e-9, abs=1e-12), (key, cue)
    # ...while the windows holding the value do change (so the check above can fail).
    jan_h0 = [k for k in with_value if k[:2] == ("decision_maker", "h0") and not _july(k)]
    assert any(with_value[k]["age_days"] != without[k]["age_days"] for k in jan_h0)


# --- (c) lost digits ---------------------------------------------------------------------------


def test_a_window_whose_sums_lost_digits_is_refitted_from_its_rows(tmp_path):
    cfg = _config(tmp_path)
    # January first: age_days near 3 million, so h0's reference (fixed until a full
    # refit) sits there; July's age_days are 0..364, about 3e4 standard deviations away:
    # (sd / offset)^2 ~ 1e-9 of the shifted sum of squares is left after centring.
    january = [_row(i, f"2024-01-{1 + i % 28:02d}") for i in range(60)]
    january = [{**r, "age_days": str(3_000_000 + int(r["age_days"]))} for r in january]
    write_csv(tmp_path / "jan.csv", january)
    ingest_json(cfg, "--kind", "decisions", str(tmp_path / "jan.csv"))
    _run(cfg, "refit")
    write_csv(tmp_path / "jul.csv", [_row(i, f"2024-07-{1 + i % 28:02d}") for i in range(60, 120)])
    ingest_json(cfg, "--kind", "decisions", str(tmp_path / "jul.csv"))
    _run(cfg, "refit")

    fits = _fits(cfg)
    july = [k for k in fits if _july(k) and k[0] == "decision_maker"]
    assert july
    for key in july:
        assert fits[key]["method"] == "qr", key
        ref = _statsmodels(cfg, key[1], fits[key]["start"], key[2])
        for cue, w in ref.items():
            assert fits[key][cue] == pytest.approx(w, rel=1e-9, abs=1e-12), (key, cue)
    # The January windows' sums kept their digits: fitted from them.
    assert {fits[k]["method"] for k in fits if k[0] == "decision_maker" and not _july(k)} == {
        "moments"
    }

"""Imperfections planted in the Ostwyn Mutual files: bad rows and restated outcomes.

Every bad row and every correction is returned as a record so that truth.json
lists them and ingest tests can count them.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from synthetic_logs.ostwyn_truth import BadRow, Correction

# kind -> (column spoiled, how). "duplicate_claim_id" adds a second row with the
# same claim_id and a different priority after the genuine one, in the same file.
BAD_ROW_KINDS: dict[str, str] = {
    "priority_not_numeric": "priority",
    "priority_out_of_range": "priority",
    "negative_claim_amount": "claim_amount",
    "unknown_gender_code": "claimant_gender",
    "missing_handler_id": "handler_id",
    "unparseable_timestamp": "scored_at",
    "bad_binary_code": "police_report",
    "duplicate_claim_id": "priority",
}
_CORRECTION_DELAY = (5, 60)  # days from first verdict to restatement (invented)


def _spoil(kind: str, row: pd.Series) -> str:
    if kind == "priority_not_numeric":
        return "n/a"
    if kind == "priority_out_of_range":
        return "140.0"
    if kind == "negative_claim_amount":
        return "-" + row["claim_amount"]
    if kind == "unknown_gender_code":
        return "U"
    if kind == "missing_handler_id":
        return ""
    if kind == "unparseable_timestamp":
        return row["scored_at"][:10] + " ??:??"
    if kind == "bad_binary_code":
        return "maybe"
    # duplicate: a plausible but different priority
    old = float(row["priority"])
    return f"{old - 10.0 if old > 50 else old + 10.0:.1f}"


def apply_bad_rows(
    rng: np.random.Generator, decisions: pd.DataFrame, outcomes: pd.DataFrame, rate: float
) -> tuple[pd.DataFrame, pd.DataFrame, list[BadRow]]:
    """Spoil about ``rate`` of the decision rows (at least one of each kind when
    ``rate`` > 0 so small runs exercise every fault).

    Returns the decisions with an ``_order`` column (file order), the outcomes
    without verdicts for spoiled claims (the genuine row of a duplicate keeps its
    verdict), and the list of bad rows.
    """
    decisions = decisions.copy()
    decisions["_order"] = np.arange(len(decisions))
    n_bad = 0 if rate <= 0 else min(len(decisions), max(round(rate * len(decisions)), 8))
    picked = rng.choice(len(decisions), size=n_bad, replace=False)
    kinds = list(BAD_ROW_KINDS)
    bad, extra, spoiled_ids = [], [], []
    for i, pos in enumerate(picked):
        kind = kinds[i % len(kinds)]
        column = BAD_ROW_KINDS[kind]
        row = decisions.iloc[pos]
        value = _spoil(kind, row)
        if kind == "duplicate_claim_id":
            copy = row.copy()
            copy[column] = value
            copy["_order"] = len(decisions) + i
            extra.append(copy)
        else:
            decisions.iat[pos, decisions.columns.get_loc(column)] = value
            spoiled_ids.append(row["claim_id"])
        file = f"decisions/decisions_{pd.Timestamp(row['_day']).date().isoformat()}.csv"
        bad.append(BadRow(row["claim_id"], kind, file, column, value))
    if extra:
        decisions = pd.concat([decisions, pd.DataFrame(extra)], ignore_index=True)
    outcomes = outcomes[~outcomes["claim_id"].isin(spoiled_ids)].reset_index(drop=True)
    bad.sort(key=lambda b: b.claim_id)
    return decisions, outcomes, bad


def plan_corrections(
    rng: np.random.Generator, outcomes: pd.DataFrame, rate: float, horizon
) -> tuple[pd.DataFrame, list[Correction]]:
    """Restate about ``rate`` of the verdicts in a later file.

    The restated (later) value is the one drawn from the outcome model; the first
    value is a clerical slip half of the time (the other value) and a plain
    re-confirmation otherwise. Restatements after ``horizon`` are not planted.
    """
    delay = rng.integers(*_CORRECTION_DELAY, size=len(outcomes), endpoint=True)
    later = outcomes["_day"].to_numpy().astype("datetime64[D]") + delay.astype("timedelta64[D]")
    dow = (later.astype("int64") + 3) % 7
    later = later + np.where(dow >= 5, 7 - dow, 0).astype("timedelta64[D]")
    eligible = np.flatnonzero(later <= np.datetime64(horizon))
    n_fix = 0 if rate <= 0 else min(len(eligible), max(round(rate * len(outcomes)), 1))
    chosen = np.sort(rng.choice(eligible, size=n_fix, replace=False))
    slip = rng.random(n_fix) < 0.5
    seconds = rng.integers(9 * 3600, 17 * 3600 + 1800, size=n_fix)

    outcomes = outcomes.copy()
    rows, records = [], []
    for pos, flip, sec in zip(chosen, slip, seconds, strict=True):
        true_value = outcomes.at[pos, "fraud_confirmed"]
        first = ("No" if true_value == "Yes" else "Yes") if flip else true_value
        outcomes.at[pos, "fraud_confirmed"] = first
        when = later[pos].astype("datetime64[s]") + np.timedelta64(int(sec), "s")
        stamp = str(when).replace("T", " ")
        rows.append(
            {"claim_id": outcomes.at[pos, "claim_id"], "closed_at": stamp,
             "fraud_confirmed": true_value, "_day": later[pos]}
        )  # fmt: skip
        records.append(
            Correction(
                claim_id=outcomes.at[pos, "claim_id"],
                first_closed_at=outcomes.at[pos, "closed_at"],
                first_value=first,
                corrected_closed_at=stamp,
                corrected_value=true_value,
                file=f"outcomes/outcomes_{str(later[pos])}.csv",
            )
        )
    if rows:
        outcomes = pd.concat([outcomes, pd.DataFrame(rows)], ignore_index=True)
    return outcomes, records

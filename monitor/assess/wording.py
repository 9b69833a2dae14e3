"""The words of an alert notification: its one-sentence finding, e-mail subject and body.

Pure functions of the notification dict (the fields of ``alerts --json`` plus
``event``); no I/O.  Missing or malformed fields read as "not reported" rather than
raising, so a partial alert still reaches a person.  ``monitor.assess.sinks`` sends what
these return.
"""

from __future__ import annotations

from monitor.cautions import CAUTION

# kind -> (subject label, sentence when opened, with {whose} {cue} {window}).
_WORDING = {
    "forbidden_cue": (
        "forbidden cue weight",
        "{whose} judgments give material weight to {cue} (forbidden by policy) "
        "in the window {window}.",
    ),
    "proxy_use": (
        "forbidden cue via proxy cues",
        "{whose} judgments give material weight to {cue} (forbidden by policy) indirectly, "
        "through permitted cues that track it, in the window {window}.",
    ),
    "drift": (
        "weight drift",
        "{whose} weight on {cue} has changed materially between two windows, the later "
        "one being {window}.",
    ),
    "consistency": (
        "consistency loss",
        "{whose} judgments have become less consistent (the judge model's R_s is below "
        "the policy floor) in the window {window}.",
    ),
    "achievement": (
        "achievement below floor",
        "{whose} judgments predict the outcome less well than policy expects "
        "(achievement r_a below the floor) in the window {window}.",
    ),
}


_STANDARD_EVIDENCE = ("window", "std_weight", "interval", "q_value", "n", "figure", "value")
# What evidence["std_weight"] holds, by kind (the size the policy compared).
_SIZE_LABEL = {"proxy_use": "standardised indirect weight", "consistency": "R_s",
               "achievement": "r_a"}  # fmt: skip


def describe_finding(alert: dict) -> str:
    """The finding of one alert notification as one plain sentence."""
    kind = str(alert.get("kind", "alert"))
    cue = alert.get("cue") or "the cue weights as a whole"
    window = _window_text(_evidence(alert).get("window"))
    label, template = _WORDING.get(
        kind,
        (kind, "{whose} judgments: alert of kind " + kind + " on {cue} in the window {window}."),
    )
    if alert.get("event") == "resolved":
        about = f"{label}, decision-maker {alert.get('decision_maker', '(unknown)')}"
        about += f", {alert['cue']}" if alert.get("cue") else ""
        return (
            f"Alert {alert.get('id', '')} is resolved: the condition it reported ({about}) "
            f"has been clear in the recent windows, the latest being {window}."
        )
    return template.format(whose=_whose(alert), cue=cue, window=window)


def _whose(alert: dict) -> str:
    name = alert.get("decision_maker", "(unknown)")
    scope = alert.get("scope", "decision_maker")
    if scope == "team":
        return f"Team {name}'s"
    if scope == "all":
        return "All decision-makers' (pooled)"
    return f"Decision-maker {name}'s"


def email_subject(alert: dict) -> str:
    """``[cuewatch] (resolved: )<label>: <decision-maker>(, <cue>) (alert <id>)``."""
    label = _WORDING.get(str(alert.get("kind")), (str(alert.get("kind", "alert")),))[0]
    prefix = "resolved: " if alert.get("event") == "resolved" else ""
    who = str(alert.get("decision_maker", "?")) + (f", {alert['cue']}" if alert.get("cue") else "")
    return f"[cuewatch] {prefix}{label}: {who} (alert {alert.get('id', '?')})"


def email_body(alert: dict, *, ack_hint: str) -> str:
    """Finding, figures (kind-specific evidence too), alert fields, caution, how to ack."""
    ev = _evidence(alert)
    interval = ev.get("interval")
    lines = [describe_finding(alert), "", "Figures:"]
    lines.append(f"  window: {_window_text(ev.get('window'))}")
    lines.append(f"  sample size: n = {_num(ev.get('n'))} decisions")
    if "std_weight" in ev or interval is not None:
        span = (
            f"{_num(interval[0])} to {_num(interval[1])}"
            if isinstance(interval, list | tuple) and len(interval) == 2
            else "not reported"
        )
        label = _SIZE_LABEL.get(str(alert.get("kind")), "standardised weight")
        if alert.get("kind") in ("consistency", "achievement"):
            label = str(ev.get("figure") or label)
        lines.append(f"  {label}: {_num(ev.get('std_weight'))} (interval {span})")
    if "q_value" in ev:
        lines.append(f"  q-value (Benjamini-Hochberg): {_num(ev['q_value'])}")
    extra = sorted((k, v) for k, v in ev.items() if k not in _STANDARD_EVIDENCE and v is not None)
    lines += [f"  {k}: {_num(v)}" for k, v in extra]
    lines += ["", "Alert:"]
    for key in ("id", "kind", "state", "opened_at", "resolved_at", "acknowledged_by", "note"):
        if alert.get(key) not in (None, ""):
            lines.append(f"  {key}: {alert[key]}")
    lines += ["", "Caution: " + CAUTION, "", f"To acknowledge this alert, run:\n  {ack_hint}", ""]
    return "\n".join(lines)


def _evidence(alert: dict) -> dict:
    ev = alert.get("evidence")
    return ev if isinstance(ev, dict) else {}


def _window_text(window: object) -> str:
    if isinstance(window, dict):
        return f"{window.get('start', '?')}..{window.get('end', '?')}"
    if isinstance(window, list | tuple) and len(window) == 2:
        return f"{window[0]}..{window[1]}"
    return "not reported" if window is None else str(window)


def _num(value: object) -> str:
    if value is None:
        return "not reported"
    if isinstance(value, dict):  # e.g. per-proxy figures
        return ", ".join(f"{k} {_num(v)}" for k, v in value.items())
    if isinstance(value, list | tuple):
        return "[" + ", ".join(_num(v) for v in value) + "]"
    if isinstance(value, bool | int) or not isinstance(value, float):
        return str(value)
    if value == 0 or abs(value) >= 0.001:
        return f"{value:.3f}"
    return f"{value:.2e}"

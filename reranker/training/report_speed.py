"""The report's "answering early" section: a threshold per share revealed against two rules.

`speed_section` returns an HTML fragment (and draws the payoff curve beside the report);
`speed_text` the same figures for the terminal. Both read `metrics["speed"]` as
`reranker.training.schedule.compare_rules` wrote it.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

from . import plots
from .report_captions import CAPTIONS
from .report_html import figure, paragraph, percent, section, sig, table

RULE_NAMES = {
    "schedule": "threshold per share revealed",
    "one_threshold": "answer at the first prefix that clears one threshold",
    "whole_clue": "always wait for the whole clue",
}
COLUMNS = ("mean payoff", "answered", "right when answered", "share seen when answering")


def payoff_words(pay: dict[str, Any]) -> str:
    """The payoff in words: reward, penalty and what waiting costs."""
    text = f"reward {pay.get('reward', 1):g}, penalty {pay.get('penalty', 1):g}, abstain 0"
    fall, cost = pay.get("reward_fall", 0.0), pay.get("cost_per_word", 0.0)
    if fall:
        text += f"; the reward falls by {fall:.0%} across the clue"
    if cost:
        text += f"; a right answer loses {cost:g} per word read"
    if not (fall or cost):
        text += "; an early answer is worth no more than a late one"
    return text


def _thresholds(rule: dict[str, Any]) -> str:
    if "thresholds" in rule:
        lo = [0.0, *rule["shares"][:-1]]
        parts = [
            f"{a:.0%}-{b:.0%}: {t:.2f}"
            for a, b, t in zip(lo, rule["shares"], rule["thresholds"], strict=True)
        ]
        if rule.get("none_abstain") is not None:
            parts.append(f"abstain if none of these >= {rule['none_abstain']:.2f}")
        return "; ".join(parts)
    return f"{rule['threshold']:.2f}"


def _cells(rule: dict[str, Any]) -> list[str]:
    return [
        sig(rule["mean_payoff"]),
        percent(rule["commit_rate"]),
        percent(rule["accuracy_when_committed"]),
        percent(rule["mean_fraction_at_commit"]),
    ]


def speed_section(metrics: dict[str, Any], out_dir: Any) -> str:
    """The section as HTML ("" when the metrics hold no speed figures); draws payoff.png."""
    speed = metrics.get("speed")
    if not speed:
        return ""
    rules = speed["rules"]
    png = plots.payoff_curve(speed["curve"], rules, Path(out_dir) / "payoff.png")
    rows = [
        (name, *_cells(rules[key]), _thresholds(rules[key]))
        for key, name in RULE_NAMES.items()
        if key in rules
    ]
    intro = (
        f"Payoff: {payoff_words(speed['payoff'])}. Each rule replays every clue prefix by "
        "prefix; a clue never answered scores 0. Mean payoff is per clue."
    )
    body = (
        paragraph(intro)
        + table(("rule", *COLUMNS, "thresholds"), rows)
        + figure(png, "mean payoff against the threshold", CAPTIONS["payoff"])
    )
    return section("answering-early", "Answering early", body)


def speed_text(speed: dict[str, Any]) -> str:
    """Terminal lines: the three rules' mean payoffs under the payoff."""
    lines = [f"answering early ({payoff_words(speed['payoff'])})"]
    for key, name in RULE_NAMES.items():
        rule = speed["rules"].get(key)
        if rule:
            answered, right = rule["commit_rate"], rule["accuracy_when_committed"]
            lines.append(
                f"  {name + ':':<54} mean payoff {sig(rule['mean_payoff'])}, answered "
                f"{percent(answered)}, right {percent(right)}, share seen "
                f"{percent(rule['mean_fraction_at_commit'])}; thresholds {_thresholds(rule)}"
            )
    return "\n".join(lines)

"""The caption under each chart of report.html: what it shows and how to read it."""

from __future__ import annotations

_RELIABILITY = (
    "Calibration of {what}. Top: each bar is one bin of predicted probability; its height is "
    "the share of {items} in the bin that were right, and the dot, at the bin's mean predicted "
    "probability, carries its 95% Wilson interval. Bars and dots on the dashed diagonal are "
    "well calibrated; below it the model is over-confident, above it under-confident. "
    "Bottom: how many {items} fall in each bin (a log scale when the counts differ widely); "
    "bins with few {items} have wide intervals."
)

CAPTIONS = {
    "reliability_top": _RELIABILITY.format(
        what="the top candidate (the reranked first candidate of each clue)",
        items="clues",
    ),
    "reliability_candidate": _RELIABILITY.format(
        what="every candidate of every clue", items="candidates"
    ),
    "prefix": (
        "Left: top-1 accuracy of the reranked list, the commit rate (share of clues answered "
        "under the decision rule) and the accuracy of the answers given, against the share of "
        "the clue revealed. Right: the mean payoff per clue at that share; the grey line is "
        "the payoff of never answering. Higher is better in both; curves that rise early mean "
        "the model can answer before the whole clue is read."
    ),
    "ablation": (
        "Each row is a model refitted on some of the feature groups; its colour is its kind "
        "(grey baseline, blue a group alone, green forward addition, red dropping one group, "
        "purple the full model). Left: candidate log-loss, lower is better. Right: top-1 "
        "accuracy per clue, higher is better. A group whose removal costs nothing adds little."
    ),
    "inlinks": (
        "How many in-links (links from other articles) the right and the wrong candidates "
        "have, as densities so the two groups compare despite their sizes. Left: raw counts, "
        "on a log density axis so the long tail shows; right: log1p(in-links). The further "
        "the right candidates' histogram lies to the right of the wrong ones', the more "
        "popularity tells them apart."
    ),
    "payoff": (
        "Mean payoff per clue against the threshold, for answering at the first prefix whose "
        "top probability clears one threshold and for always waiting for the whole clue; the "
        "dots mark the thresholds chosen. The dashed green line is the payoff of a threshold "
        "per share revealed. Higher is better; below the grey zero line a rule loses more "
        "than it would by never answering."
    ),
}

"""The report's statistics are the shared module ``xbench.stats`` (one copy for every stage); this name
stays so that ``from xbench.report.stats import ...`` keeps working."""

from __future__ import annotations

from xbench.stats import (
    CI_METHOD,
    MIN_N_FOR_CI,
    FriedmanResult,
    Interval,
    PairedTest,
    anchor_score,
    average_ranks,
    bootstrap_ci,
    cd_groups,
    friedman,
    hierarchical_bootstrap_ci,
    holm,
    holm_matrix,
    kendall_tau,
    min_pairs_for_test,
    nemenyi_cd,
    nemenyi_q,
    pairwise_wilcoxon,
    rank_matrix,
    significance_mark,
    wilcoxon_min_p,
    wilcoxon_paired,
)

__all__ = [
    "CI_METHOD",
    "MIN_N_FOR_CI",
    "FriedmanResult",
    "Interval",
    "PairedTest",
    "anchor_score",
    "average_ranks",
    "bootstrap_ci",
    "cd_groups",
    "friedman",
    "hierarchical_bootstrap_ci",
    "holm",
    "holm_matrix",
    "kendall_tau",
    "min_pairs_for_test",
    "nemenyi_cd",
    "nemenyi_q",
    "pairwise_wilcoxon",
    "rank_matrix",
    "significance_mark",
    "wilcoxon_min_p",
    "wilcoxon_paired",
]

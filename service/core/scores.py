"""Label-invariant agreement scores; scikit-learn's implementations are the reference.

Adjusted Rand index (Hubert & Arabie 1985), Rand index (Rand 1971), normalised
mutual information (Vinh, Epps & Bailey 2010).
"""

from __future__ import annotations

from sklearn.metrics import adjusted_rand_score, normalized_mutual_info_score, rand_score


def agreement(labels_true, labels_pred) -> dict[str, float]:
    """``{"ari", "nmi", "rand"}`` between an expert grouping and a computed one."""
    return {
        "ari": float(adjusted_rand_score(labels_true, labels_pred)),
        "nmi": float(normalized_mutual_info_score(labels_true, labels_pred)),
        "rand": float(rand_score(labels_true, labels_pred)),
    }

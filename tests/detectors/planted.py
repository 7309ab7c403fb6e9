"""Random answerers planted among the bfi respondents, for the reference-based indices."""

from __future__ import annotations

import numpy as np
import pandas as pd
from sklearn.metrics import roc_auc_score

from detectors import State, matrix_from_frame


def planted_random_on_bfi(detector, bfi_instrument, bfi_frame, planted=200, seed=2800) -> dict:
    """ROC AUC (scikit-learn's roc_auc_score, an outside implementation) of the detector's
    score for ``planted`` random answerers of each kind among the 2,800 bfi respondents, with
    the reference estimated on the originals; and the flagged shares with uniform random ones.

    Kinds: ``uniform`` (every option equally likely) and ``middle`` (normal around 3.5 with SD
    1, rounded and clipped to 1..6).
    """
    ids = list(bfi_instrument.item_ids)
    rng = np.random.default_rng(seed)
    kinds = {
        "uniform": rng.integers(1, 7, (planted, len(ids))).astype(float),
        "middle": np.clip(np.rint(rng.normal(3.5, 1, (planted, len(ids)))), 1, 6),
    }
    original = matrix_from_frame(bfi_instrument, bfi_frame).matrix
    reference = detector.fit(bfi_instrument, original)
    is_random = np.r_[np.zeros(original.n_respondents, dtype=bool), np.ones(planted, dtype=bool)]
    out = {}
    for kind, values in kinds.items():
        frame = pd.DataFrame(values, columns=ids)
        frame.insert(0, "respondent_id", [f"{kind}-{i}" for i in range(planted)])
        both = matrix_from_frame(
            bfi_instrument, pd.concat([bfi_frame, frame], ignore_index=True)
        ).matrix
        result = detector.screen(bfi_instrument, both, reference)
        assessed = result.states == State.ASSESSED
        out[kind] = roc_auc_score(is_random[assessed], result.scores[assessed])
        if kind == "uniform":
            out["flagged_original"] = result.flags[~is_random & assessed].mean()
            out["flagged_random"] = result.flags[is_random & assessed].mean()
    return out

"""One analysis sample: what every estimator of one bootstrap replicate (or the point estimate) needs.

The rows of the cohort are never copied or resampled; a replicate differs only in ``freq``, the
frequency weights (multinomial counts), and in what was refitted with them (``e``, ``weights``).
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np
import pandas as pd

from emulant.protocol import Protocol


@dataclass(frozen=True)
class AnalysisSample:
    cohort: pd.DataFrame  # cohort.parquet as read; the same object for every replicate
    protocol: Protocol
    X: np.ndarray  # covariate design, n x p, no intercept (propensity.Design.transform)
    columns: tuple[str, ...]  # names of X's columns
    a: np.ndarray  # 1 for the treated arm (strategies.treated), 0 for the comparator
    freq: np.ndarray  # frequency weights: ones for the point estimate, counts for a replicate
    e: np.ndarray  # propensity of the treated arm, fitted with freq
    weights: Mapping[str, np.ndarray]  # estimand -> weight, fitted with freq; freq NOT multiplied in

    @property
    def n(self) -> int:
        return int(len(self.a))

    @property
    def treated_arm(self) -> str:
        return self.protocol.strategies.treated

    @property
    def comparator_arm(self) -> str:
        return self.protocol.strategies.comparator

"""Published agreement formulas, written out here to check the service's figures against."""

from __future__ import annotations

import numpy as np
import pandas as pd


def ba2007_limits(d: np.ndarray, pids: np.ndarray) -> tuple[float, float, float]:
    """Bland & Altman 2007 (J Biopharm Stat 17:571), true value varying: bias and 95% limits from the one-way
    ANOVA of the differences by participant."""
    frame = pd.DataFrame({"d": d, "p": pids})
    groups = frame.groupby("p")["d"]
    m, n, k = groups.size().to_numpy(dtype=float), float(len(d)), groups.ngroups
    grand = d.mean()
    ms_between = float((m * (groups.mean().to_numpy() - grand) ** 2).sum() / (k - 1))
    ms_within = float(((frame["d"] - groups.transform("mean")) ** 2).sum() / (n - k))
    divisor = (n ** 2 - (m ** 2).sum()) / ((k - 1) * n)
    sd = np.sqrt(max(0.0, (ms_between - ms_within) / divisor) + ms_within)
    return grand, grand - 1.96 * sd, grand + 1.96 * sd

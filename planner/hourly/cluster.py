"""Load levels from a profile: a load-duration clustering.

Intervals are grouped into ``k`` levels by a one-dimensional k-means on the interval's mean
factor (weighted by duration), started from evenly spaced quantiles so the result is the same
on every run. Each level gets the duration-weighted mean factor of every profile column and the
intervals (hours) it stands for. Levels are named and ordered from the highest load down.

>>> import numpy as np
>>> from planner.hourly.profile import profile_from_factors
>>> prof = profile_from_factors([1.0, 0.95, 0.5, 0.45, 0.7, 0.72])
>>> lv = cluster_levels(prof, 3)
>>> lv.table[["level", "hours", "network"]].values.tolist()
[['level 1', 2.0, 0.975], ['level 2', 2.0, 0.71], ['level 3', 2.0, 0.475]]
>>> lv.level_of_interval.tolist()
[0, 0, 2, 2, 1, 1]
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from .profile import LoadProfile


@dataclass
class LoadLevels:
    """Levels found by :func:`cluster_levels`: ``table`` (level, hours, one mean factor per
    profile column) and ``level_of_interval`` (level index of each profile interval)."""
    table: pd.DataFrame
    level_of_interval: np.ndarray

    def __repr__(self):
        return f"LoadLevels(levels={len(self.table)}, hours={self.table.hours.sum():g})"


def cluster_levels(profile: LoadProfile, k: int, names=None, max_iter: int = 100) -> LoadLevels:
    """Group the profile's intervals into ``k`` load levels (see module docstring)."""
    k = int(k)
    x = profile.factors.mean(axis=1)
    w = profile.duration_h
    if k < 1:
        raise ValueError(f"need at least one level, got {k}")
    k = min(k, len(np.unique(x)))
    order = np.argsort(x, kind="stable")
    cum = np.cumsum(w[order]) / w.sum()
    centres = np.array([x[order][np.searchsorted(cum, (i + 0.5) / k)] for i in range(k)])
    centres = np.unique(centres)
    while len(centres) < k:       # ties in the quantiles: spread the missing centres evenly
        centres = np.unique(np.concatenate([centres, np.linspace(x.min(), x.max(), k)]))[:k]
    for _ in range(max_iter):
        lab = np.argmin(np.abs(x[:, None] - centres[None, :]), axis=1)
        new = np.array([np.average(x[lab == j], weights=w[lab == j]) if (lab == j).any() else centres[j]
                        for j in range(len(centres))])
        if np.allclose(new, centres, rtol=0, atol=1e-12):
            break
        centres = new
    lab = np.argmin(np.abs(x[:, None] - centres[None, :]), axis=1)
    # highest load first
    rank = np.argsort(-centres, kind="stable")
    relabel = np.empty_like(rank)
    relabel[rank] = np.arange(len(rank))
    lab = relabel[lab]
    used = np.unique(lab)
    rows = []
    names = list(names) if names is not None else [f"level {i + 1}" for i in range(len(used))]
    for i, j in enumerate(used):
        m = lab == j
        row = {"level": names[i], "hours": float(w[m].sum())}
        for c, name in enumerate(profile.columns):
            row[name] = float(np.average(profile.factors[m, c], weights=w[m]))
        rows.append(row)
    remap = np.full(lab.max() + 1, -1)
    remap[used] = np.arange(len(used))
    return LoadLevels(pd.DataFrame(rows), remap[lab])

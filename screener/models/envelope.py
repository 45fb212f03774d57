"""Environmental envelope: how central a cell is within the records' range, per layer."""

from __future__ import annotations

import numpy as np

from screener.models.base import NicheModel

__all__ = ["EnvelopeNiche"]


class EnvelopeNiche(NicheModel):
    """Percentile envelope: ``min over predictors of 2 * min(F, 1 - F)``.

    ``F`` is the percentile of a cell's value among the presence values of that
    predictor.  Cells at the records' median score 1; cells outside the records' range on
    any predictor score 0.  Background rows are not used.

    Parameters
    ----------
    None.

    Attributes
    ----------
    values_ : list of ndarray
        Per predictor, the distinct presence values, ascending.
    percentiles_ : list of ndarray
        Per predictor, ``F`` at those values: mid-rank plotting positions
        ``(#below + 0.5 * #equal) / n`` (Hazen positions ``(i - 0.5) / n`` without ties).
    n_features_in_ : int

    Notes
    -----
    Between distinct presence values ``F`` is interpolated linearly, so the surface is
    continuous inside the envelope; below the smallest and above the largest value
    ``F`` is 0 and 1.  The lowest and highest records therefore score ``1/n`` on that
    predictor, not 0, so the minimum training presence is never forced to 0.

    References
    ----------
    .. [1] Busby, J. R. (1991). In Margules & Austin (eds), Nature Conservation: Cost
       Effective Biological Surveys and Data Analysis, CSIRO, pp. 64-68 (climatic
       envelopes from percentiles of the records).
    .. [2] Nix, H. A. (1986). A biogeographic analysis of Australian elapid snakes. In
       Longmore (ed.), Atlas of Elapid Snakes of Australia, pp. 4-15.
    """

    uses_background = False
    accepts_invalid_rows = True

    def __init__(self):
        pass

    def fit(self, presence, background=None):
        """Store the presence percentiles of every predictor.

        Parameters
        ----------
        presence : array_like of shape (n, p)
        background : ignored

        Returns
        -------
        self
        """
        presence, _ = self._check_fit_inputs(presence, background)
        n = presence.shape[0]
        values, pct = [], []
        for j in range(presence.shape[1]):
            u, counts = np.unique(presence[:, j].astype(np.float64), return_counts=True)
            below = np.concatenate([[0], np.cumsum(counts)[:-1]])
            values.append(u)
            pct.append((below + 0.5 * counts) / n)
        self.values_ = values
        self.percentiles_ = pct
        self.n_features_in_ = presence.shape[1]
        return self

    def _predict_chunk(self, X):
        out = np.ones(X.shape[0], dtype=np.float64)
        for j, (u, f) in enumerate(zip(self.values_, self.percentiles_, strict=True)):
            x = X[:, j].astype(np.float64)
            fj = np.interp(x, u, f)
            fj[x < u[0]] = 0.0
            fj[x > u[-1]] = 1.0
            np.minimum(out, 2.0 * np.minimum(fj, 1.0 - fj), out=out)
        return out

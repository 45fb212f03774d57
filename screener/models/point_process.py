"""Poisson point-process niche model (family ``"ppm"``).

The intensity of records over the study area is modelled as ``exp(eta(x))``, with
``eta`` a sum of terms of the predictors (linear, quadratic, pairwise interaction, hinge
and step terms) under an L1 penalty.  The fit is a background-weighted logistic
regression, which converges on the Poisson point-process likelihood as the background
weight grows (Renner & Warton 2013; Fithian & Hastie 2013).  How strong the penalty
is, and so how many terms survive, is chosen along a penalty path by the held-out,
block-wise log-likelihood of the records (see :class:`PointProcessNiche`).
"""

from __future__ import annotations

import logging
import math
import warnings

import numpy as np
from scipy.special import logsumexp
from sklearn.linear_model import LogisticRegression
from sklearn.model_selection import GroupKFold
from sklearn.utils.validation import check_is_fitted

from screener.errors import InputError, ScreenerDeprecationWarning, suggest
from screener.models.base import NicheModel, check_predictors

__all__ = ["PointProcessNiche", "TERM_SETS", "DEFAULT_TERMS", "normalise_terms"]

log = logging.getLogger(__name__)

#: Term sets, in the order their columns are built.
TERM_SETS = ("linear", "quadratic", "interaction", "hinge", "step")

#: Term sets used when none are given, whatever the number of records: smooth
#: one-humped responses (linear + quadratic), the classic niche shape, cheap to fit;
#: the penalty path decides what is kept.  Add "hinge" for asymmetric responses when
#: records are many (each hinge predictor adds 2 x n_knots columns to every fit).
DEFAULT_TERMS = ("linear", "quadratic")

#: Penalties on the path: this many values from just below the smallest penalty
#: that zeroes every term down to ``_PATH_DEPTH`` times that value.
_PATH_DEPTH = 1e-2

#: The path stops when the held-out likelihood has not improved for this many steps.
_PATIENCE = 2

#: Background rows used by the held-out fits along the path (a random subset, weighted
#: up to the whole background's weight; fit time grows with rows).  The held-out
#: density is still normalised over the whole background, and the final fit uses it all.
_PATH_BACKGROUND = 1000

#: Solver tolerance of the held-out fits along the path (the final fit uses 1e-6).
_PATH_TOL = 1e-5

#: Letter codes of the deprecated ``feature_classes`` setting -> term sets.
_LEGACY_LETTERS = {"L": "linear", "Q": "quadratic", "P": "interaction", "H": "hinge",
                   "T": "step"}
#: Penalty per presence at multiplier 1 and n = 1 in the deprecated ``regularization``
#: setting (multiplier m -> l1_penalty = m * 0.5 / sqrt(n)).
_LEGACY_BASE = 0.5


def normalise_terms(terms) -> tuple[str, ...]:
    """Term-set names in build order, from a sequence or a ``"+"``-joined string.

    Examples
    --------
    >>> normalise_terms(["hinge", "linear"])
    ('linear', 'hinge')
    >>> normalise_terms("linear+quadratic")
    ('linear', 'quadratic')
    """
    if isinstance(terms, str):
        names = [t.strip().lower() for t in terms.split("+")]
    else:
        try:
            names = [str(t).strip().lower() for t in terms]
        except TypeError:
            names = [repr(terms)]
    for name in names:
        if name not in TERM_SETS:
            raise InputError(
                f"terms: {name!r} is not a term set; use one or more of "
                f"{', '.join(TERM_SETS)}, e.g. terms = [\"linear\", \"quadratic\"]."
                + suggest(name, TERM_SETS)
            )
    if not names:
        raise InputError(f"terms is empty; use one or more of {', '.join(TERM_SETS)}.")
    return tuple(t for t in TERM_SETS if t in names)


def _terms_from_letters(code) -> tuple[str, ...]:
    """Term sets for a deprecated letter code ("auto" -> :data:`DEFAULT_TERMS`)."""
    text = str(code).strip()
    if text.lower() == "auto":
        return DEFAULT_TERMS
    bad = sorted(set(text.upper()) - set(_LEGACY_LETTERS))
    if bad or not text:
        raise InputError(
            f"feature_classes={code!r} (deprecated) is not a letter code; use "
            f"terms = [...] with names from {', '.join(TERM_SETS)}."
        )
    return normalise_terms([_LEGACY_LETTERS[c] for c in text.upper()])


class _TermSpace:
    """Term columns of the chosen term sets over standardised predictors ``z``."""

    def __init__(self, terms: tuple, knots: list[np.ndarray], p: int):
        self.terms = terms
        self.knots = knots
        self.p = p
        cols = []  # (kind, j, other predictor or knot)
        if "linear" in terms:
            cols += [("linear", j, None) for j in range(p)]
        if "quadratic" in terms:
            cols += [("quadratic", j, None) for j in range(p)]
        if "interaction" in terms:
            cols += [("interaction", j, k) for j in range(p) for k in range(j + 1, p)]
        if "hinge" in terms:
            for j in range(p):
                cols += [("hinge_up", j, t) for t in knots[j]]
                cols += [("hinge_down", j, t) for t in knots[j]]
        if "step" in terms:
            for j in range(p):
                cols += [("step", j, t) for t in knots[j]]
        self.columns = cols

    def build(self, z: np.ndarray) -> np.ndarray:
        out = np.empty((z.shape[0], len(self.columns)), dtype=np.float64)
        for i, (kind, j, a) in enumerate(self.columns):
            zj = z[:, j]
            if kind == "linear":
                out[:, i] = zj
            elif kind == "quadratic":
                out[:, i] = zj * zj
            elif kind == "interaction":
                out[:, i] = zj * z[:, a]
            elif kind == "hinge_up":
                out[:, i] = np.maximum(zj - a, 0.0)
            elif kind == "hinge_down":
                out[:, i] = np.maximum(a - zj, 0.0)
            else:  # "step"
                out[:, i] = zj > a
        return out


class PointProcessNiche(NicheModel):
    """Poisson point-process niche model with an L1 penalty (family ``"ppm"``).

    Parameters
    ----------
    terms : sequence of str, default ("linear", "quadratic")
        Term sets built from each predictor: any of ``"linear"``, ``"quadratic"``,
        ``"interaction"`` (pairwise products), ``"hinge"`` (``max(z - t, 0)`` and
        ``max(t - z, 0)`` at knots ``t``) and ``"step"`` (``z > t``).  A string joined
        by ``"+"`` also works, e.g. ``"linear+quadratic"``.
    l1_penalty : float, sequence of float or None, default None
        L1 penalty per record on each standardised term coefficient.  ``None``: chosen
        along a path of ``n_penalties`` values by the held-out log-likelihood (see
        Notes); a sequence: chosen from those values the same way; a number: fixed.
    n_penalties : int, default 8
        Length of the penalty path when ``l1_penalty`` is None.
    n_blocks : int, default 4
        Blocks of records for the held-out likelihood (fewer when there are fewer
        records or groups).
    background_weight : float, default 100.0
        Weight of each background row relative to a record in the logistic fit.
    n_knots : int, default 10
        Hinge and step knots per predictor, at background quantiles
        ``1/(n_knots+1), ..., n_knots/(n_knots+1)``.
    max_iter : int, default 1000
        Iteration limit of the liblinear solver.
    random_state : int, default 0
        Seed of the solver's coordinate order and of the block assignment.
    feature_classes, regularization : deprecated
        Old names, accepted for one release with a
        :class:`~screener.errors.ScreenerDeprecationWarning`: a letter
        code maps to ``terms`` (L linear, Q quadratic, P interaction, H hinge, T step;
        "auto" to the default terms); a multiplier ``m`` (or several) maps to
        ``l1_penalty = 0.5 m / sqrt(n)`` for ``n`` records.

    Attributes
    ----------
    terms_ : tuple of str
        Term sets of the fitted model.
    l1_penalty_ : float
        Penalty of the fitted model.
    n_coefficients_ : int
        Non-zero term coefficients of the fitted model.
    heldout_log_likelihood_ : float
        Mean held-out log-likelihood per record at the chosen penalty (NaN when the
        penalty was fixed).
    path_ : list of dict
        Every penalty tried: ``l1_penalty``, ``heldout_log_likelihood`` (mean per
        record), ``standard_error`` (over blocks) and ``n_coefficients`` (mean over
        blocks); empty when the penalty was fixed.
    n_blocks_ : int
        Blocks used for the held-out likelihood (0 when the penalty was fixed).
    offset_ : float
        The constant ``c`` in the output ``1 - exp(-exp(eta + c))``.
    mean_, scale_ : ndarray of shape (p,)
        Background mean and standard deviation used to standardise predictors.
    n_features_in_ : int

    Notes
    -----
    *Likelihood.*  Records (``y = 1``, weight 1) against background cells (``y = 0``,
    weight ``background_weight``), L1-penalised logistic regression with scikit-learn's
    liblinear solver (``l1_ratio=1``; the intercept is scaled by 100 so that its
    penalty is negligible).  With heavy background weights this is the Poisson
    point-process likelihood of the records, the background standing in for the
    study area's cells [1]_ [2]_.  Predictors are standardised on the background, and so
    is every term column; constant columns are dropped.  The objective per record is
    ``-(1/n) sum_i w_i log p_i + l1_penalty * sum_j |beta_j|``.

    *Choosing the penalty (our procedure).*  The path runs from just below
    ``lambda_max``, the smallest penalty that keeps every coefficient at zero
    (the largest absolute score of the weighted log-likelihood at zero, per record),
    down to ``0.01 lambda_max`` in equal log steps.  The records are split into
    blocks: the ``groups`` passed to :meth:`fit` (the pipeline passes four spatial
    blocks of the records), or else a seeded random split.  Each block is left out in
    turn; the model is fitted to the other records and the background at every
    penalty, and the left-out records are scored by their log density
    ``eta(x) - log sum_bg exp(eta)`` over the whole background.  The chosen penalty
    has the highest mean held-out log-likelihood per record; then the model is
    refitted to every record at that penalty.  The path runs from strong to weak
    penalties and stops after ``_PATIENCE`` steps without improvement; its fits use a
    seeded subset of at most ``_PATH_BACKGROUND`` background rows, weighted up to the
    whole background's weight.

    *Output.*  The complementary log-log link [3]_ turns the log intensity into a
    probability of at least one occurrence per cell: ``1 - exp(-exp(eta + c))``.
    Presence-only data cannot fix the absolute intensity, so ``c`` sets a reference
    level of our choosing: ``c = -mean(eta)`` over the training records, so a cell as
    suitable as the typical record (in log intensity) scores ``1 - 1/e = 0.63``.

    References
    ----------
    .. [1] Renner, I. W. & Warton, D. I. (2013). Biometrics 69:274-281 (the
       background-weighted fit as a Poisson point-process model).
    .. [2] Fithian, W. & Hastie, T. (2013). Finite-sample equivalence in statistical
       models for presence-only data. Annals of Applied Statistics 7:1917-1939.
    .. [3] Phillips, S. J. et al. (2017). Ecography 40:887-893 (the complementary
       log-log link for presence-only intensity models).
    .. [4] Tibshirani, R. (1996). Regression shrinkage and selection via the lasso.
       Journal of the Royal Statistical Society B 58:267-288 (the L1 penalty).
    .. [5] Roberts, D. R. et al. (2017). Cross-validation strategies for data with
       temporal, spatial, hierarchical, or phylogenetic structure. Ecography
       40:913-929 (blocked cross-validation).
    """

    accepts_invalid_rows = True

    def __init__(
        self,
        *,
        terms=DEFAULT_TERMS,
        l1_penalty=None,
        n_penalties: int = 8,
        n_blocks: int = 4,
        background_weight: float = 100.0,
        n_knots: int = 10,
        max_iter: int = 1000,
        random_state=0,
        feature_classes=None,
        regularization=None,
    ):
        self.terms = terms
        self.l1_penalty = l1_penalty
        self.n_penalties = n_penalties
        self.n_blocks = n_blocks
        self.background_weight = background_weight
        self.n_knots = n_knots
        self.max_iter = max_iter
        self.random_state = random_state
        self.feature_classes = feature_classes
        self.regularization = regularization

    #: Deprecated parameter -> its replacement (accepted for one release).
    deprecated_params = {"feature_classes": "terms", "regularization": "l1_penalty"}

    # --- settings ---------------------------------------------------------------------
    def _resolve(self, n: int):
        """Term sets and penalty (None, a float or an array) after deprecations."""
        terms = normalise_terms(self.terms)
        if self.feature_classes is not None:
            terms = _terms_from_letters(self.feature_classes)
            warnings.warn(
                f"[models.ppm] feature_classes = {self.feature_classes!r} is "
                "deprecated and will be removed in the next release; write terms = "
                f"{list(terms)!r} instead (letters: L linear, Q quadratic, "
                "P interaction, H hinge, T step; 'auto' is the default terms, whose "
                "complexity is now chosen along the L1 penalty path).",
                ScreenerDeprecationWarning,
                stacklevel=3,
            )
        penalty = self.l1_penalty
        if self.regularization is not None:
            mult = np.atleast_1d(np.asarray(self.regularization, dtype=float))
            if mult.size == 0 or not np.all(np.isfinite(mult)) or np.any(mult <= 0):
                raise InputError(
                    f"regularization={self.regularization!r} (deprecated): use "
                    "l1_penalty, a positive number, or leave it out."
                )
            lam = mult * _LEGACY_BASE / math.sqrt(n)
            penalty = float(lam[0]) if lam.size == 1 else lam
            shown = np.round(lam, 6).tolist()
            shown = shown[0] if lam.size == 1 else shown
            warnings.warn(
                f"[models.ppm] regularization = {self.regularization!r} is deprecated "
                "and will be removed in the next release; write l1_penalty = "
                f"{shown!r} "
                f"for these {n} records (a multiplier m is "
                "0.5 m / sqrt(n)), or leave it out to choose the penalty by held-out "
                "likelihood.",
                ScreenerDeprecationWarning,
                stacklevel=3,
            )
        if penalty is not None and not np.isscalar(penalty):
            penalty = np.asarray(penalty, dtype=float).ravel()
            if penalty.size == 1:
                penalty = float(penalty[0])
        if penalty is not None:
            vals = np.atleast_1d(np.asarray(penalty, dtype=float))
            if vals.size == 0 or not np.all(np.isfinite(vals)) or np.any(vals <= 0):
                raise InputError(
                    f"l1_penalty={self.l1_penalty!r}: use a positive number, several "
                    "(chosen by held-out likelihood), or leave it out (a path)."
                )
        if self.background_weight <= 0 or self.n_knots < 1:
            raise InputError(
                "background_weight must be > 0 and n_knots >= 1; got "
                f"{self.background_weight!r} and {self.n_knots!r}."
            )
        if self.n_penalties < 2 or self.n_blocks < 2:
            raise InputError(
                "n_penalties and n_blocks must be at least 2; got "
                f"{self.n_penalties!r} and {self.n_blocks!r}."
            )
        return terms, penalty

    # --- fitting ----------------------------------------------------------------------
    def fit(self, presence, background, *, groups=None):
        """Fit along the penalty path, choose the penalty, refit to every record.

        Parameters
        ----------
        presence : array_like of shape (n, p)
        background : array_like of shape (m, p)
        groups : array_like of shape (n,), optional
            Block label of each record for the held-out likelihood (e.g. a spatial
            block).  Default: a seeded random split into ``n_blocks`` blocks.

        Returns
        -------
        self
        """
        presence, background = self._check_fit_inputs(presence, background)
        presence = presence.astype(np.float64)
        background = background.astype(np.float64)
        n, p = presence.shape
        terms, penalty = self._resolve(n)
        mean = background.mean(axis=0)
        scale = background.std(axis=0)
        scale = np.where(scale > 0, scale, 1.0)
        zp = (presence - mean) / scale
        zb = (background - mean) / scale
        levels = np.arange(1, self.n_knots + 1) / (self.n_knots + 1)
        knots = [np.unique(np.quantile(zb[:, j], levels)) for j in range(p)]
        space = _TermSpace(terms, knots, p)
        F = np.vstack([space.build(zp), space.build(zb)])
        fs = F[n:].std(axis=0)
        keep = fs > 1e-12
        if not np.any(keep):
            raise InputError(
                "Every predictor is constant over the background, so the point-process "
                "model has nothing to fit; check the layers and the accessible area."
            )
        fs = fs[keep]
        Fs = (F[:, keep] - F[n:, keep].mean(axis=0)) / fs
        y = np.r_[np.ones(n), np.zeros(zb.shape[0])]
        w = np.r_[np.ones(n), np.full(zb.shape[0], float(self.background_weight))]

        self.path_, self.n_blocks_ = [], 0
        self.heldout_log_likelihood_ = math.nan
        if penalty is None or not np.isscalar(penalty):
            path = self._penalty_path(Fs, y, w, n) if penalty is None else penalty
            blocks = self._blocks(zp, groups)
            if blocks is None:
                penalty = float(path[len(path) // 2])
                log.info(
                    "ppm: %d record(s), too few to hold out; l1_penalty %.3g",
                    n,
                    penalty,
                )
            else:
                penalty = self._choose(Fs, y, w, n, np.sort(path)[::-1], blocks)
        beta = self._fit_one(Fs, y, w, n, float(penalty))
        self._finish(space, keep, fs, beta, mean, scale, zb, zp)
        self.terms_ = terms
        self.l1_penalty_ = float(penalty)
        self.n_coefficients_ = int(np.count_nonzero(beta))
        return self

    def _penalty_path(self, Fs, y, w, n):
        """Penalties from just below ``lambda_max`` down to ``0.01 lambda_max``."""
        p0 = np.sum(w * y) / np.sum(w)  # fitted probability of the intercept-only model
        lam_max = float(np.max(np.abs(Fs.T @ (w * (p0 - y))))) / n
        if not (math.isfinite(lam_max) and lam_max > 0):
            return np.array([1.0])  # no term moves the fit from zero: a flat model
        return np.geomspace(lam_max, lam_max * _PATH_DEPTH, self.n_penalties + 1)[1:]

    def _blocks(self, zp, groups):
        """Block label per record, or None when fewer than 2 blocks can be formed."""
        n = zp.shape[0]
        if groups is not None:
            groups = np.asarray(groups)
            if groups.shape != (n,):
                raise InputError(
                    f"groups has shape {groups.shape}; give one block label per record "
                    f"({n})."
                )
            labels = np.unique(groups, return_inverse=True)[1]
            k = min(self.n_blocks, int(labels.max()) + 1)
            if k < 2:
                return None
            folds = np.empty(n, dtype=np.intp)
            splits = GroupKFold(n_splits=k).split(zp, groups=labels)
            for f, (_, test) in enumerate(splits):
                folds[test] = f
            return folds
        k = min(self.n_blocks, n)
        if k < 2:
            return None
        rng = np.random.default_rng(self.random_state)
        return rng.permutation(np.arange(n) % k)

    def _choose(self, Fs, y, w, n, path, blocks):
        """Penalty with the highest mean held-out log-likelihood per record.

        The path runs from strong to weak penalties and stops once the held-out
        likelihood has fallen for ``_PATIENCE`` penalties in a row below its best.
        """
        bg = np.arange(n, Fs.shape[0])
        sub = bg
        wb = w.copy()
        if bg.size > _PATH_BACKGROUND:
            rng = np.random.default_rng(self.random_state)
            sub = np.sort(rng.choice(bg, _PATH_BACKGROUND, replace=False))
            wb[bg] *= bg.size / _PATH_BACKGROUND
        ids = np.unique(blocks)
        splits = []
        for block in ids:
            test = np.flatnonzero(blocks == block)
            rows = np.r_[np.flatnonzero(blocks != block), sub]
            splits.append((test, rows, rows.size - sub.size))
        self.path_ = []
        best, best_ll, since_best = None, -math.inf, 0
        for lam in path:
            ll = np.zeros(n)
            nnz = []
            for test, rows, n_train in splits:
                beta = self._fit_one(
                    Fs[rows], y[rows], wb[rows], n_train, lam, tol=_PATH_TOL
                )
                nnz.append(np.count_nonzero(beta))
                ll[test] = Fs[test] @ beta - logsumexp(Fs[bg] @ beta)
            per_block = np.array([ll[blocks == b].mean() for b in ids])
            mean_ll = float(ll.mean())
            self.path_.append(
                {
                    "l1_penalty": float(lam),
                    "heldout_log_likelihood": mean_ll,
                    "standard_error": float(
                        per_block.std(ddof=1) / math.sqrt(len(ids))
                    ),
                    "n_coefficients": float(np.mean(nnz)),
                }
            )
            if mean_ll > best_ll:  # ties keep the stronger penalty
                best, best_ll, since_best = float(lam), mean_ll, 0
            else:
                since_best += 1
                if since_best >= _PATIENCE:
                    break
        self.n_blocks_ = len(ids)
        self.heldout_log_likelihood_ = best_ll
        return best

    def _fit_one(self, Fs, y, w, n, lam, tol=1e-6):
        """One penalised fit at penalty ``lam`` per record; the term coefficients."""
        clf = LogisticRegression(
            l1_ratio=1.0,
            solver="liblinear",
            C=1.0 / (lam * n),
            intercept_scaling=100.0,
            max_iter=self.max_iter,
            tol=tol,
            random_state=self.random_state,
        )
        clf.fit(Fs, y, sample_weight=w)
        return clf.coef_[0].copy()

    def _finish(self, space, keep, fs, beta, mean, scale, zb, zp):
        """Compile the selected coefficients into a fast per-predictor form."""
        p = space.p
        lin = np.zeros(p)
        quad = np.zeros((p, p))
        pieces: dict[int, list] = {}
        cols = [c for c, k in zip(space.columns, keep, strict=True) if k]
        raw = beta / fs
        for (kind, j, a), c in zip(cols, raw, strict=True):
            if c == 0:
                continue
            if kind == "linear":
                lin[j] += c
            elif kind == "quadratic":
                quad[j, j] += c
            elif kind == "interaction":
                quad[j, a] += c
            else:
                pieces.setdefault(j, []).append((kind, a, c))
        piecewise = []
        for j, items in sorted(pieces.items()):
            kn = np.unique([a for _, a, _ in items])
            slope = np.zeros(kn.size + 1)
            off = np.zeros(kn.size + 1)
            seg = np.arange(kn.size + 1)  # segment s: knots with index < s are < z
            for kind, a, c in items:
                i = int(np.searchsorted(kn, a))
                if kind == "hinge_up":  # c * max(z - a, 0), active when z > a
                    act = seg > i
                    slope[act] += c
                    off[act] -= c * a
                elif kind == "hinge_down":  # c * max(a - z, 0), active when z <= a
                    act = seg <= i
                    slope[act] -= c
                    off[act] += c * a
                else:  # step c * (z > a)
                    off[seg > i] += c
            piecewise.append((j, kn, slope, off))
        self.mean_ = mean
        self.scale_ = scale
        self._c_lin = lin
        self._c_quad = quad if np.any(quad) else None
        self._c_piecewise = piecewise
        # float32 fast path in predictor units: the scale is folded into the
        # coefficients and knots; only quadratic terms need centred values (for
        # precision).  Constants dropped here are restored through ``_c32_const``.
        inv = 1.0 / scale
        pw32 = []
        const = -float(np.dot(lin * inv, mean))
        for j, kn, slope_j, off_j in piecewise:
            slope_x = slope_j * inv[j]
            off_x = off_j - slope_j * inv[j] * mean[j]
            pw32.append(
                (
                    j,
                    (mean[j] + scale[j] * kn).astype(np.float32),
                    slope_x.astype(np.float32),
                    off_x.astype(np.float32),
                )
            )
        self._c32 = (
            mean.astype(np.float32),
            (lin * inv).astype(np.float32),
            None
            if self._c_quad is None
            else (quad * np.outer(inv, inv)).astype(np.float32),
            pw32,
        )
        self._c32_const = const
        eta_bg = self._eta64(zb)
        log_z = float(logsumexp(eta_bg))
        self._c_log_norm = log_z
        # Reference level: the typical training record (mean log intensity) gets
        # exp(eta + c) = 1, i.e. a score of 1 - 1/e.
        self.offset_ = -float(np.mean(self._eta64(zp)))
        self.n_features_in_ = p

    # --- prediction -------------------------------------------------------------------
    def _eta64(self, z):
        eta = z @ self._c_lin
        if self._c_quad is not None:
            eta += np.einsum("ij,ij->i", z @ self._c_quad, z)
        for j, kn, slope, off in self._c_piecewise:
            s = np.searchsorted(kn, z[:, j], side="left")
            eta += slope[s] * z[:, j] + off[s]
        return eta

    def _eta(self, X):
        """Linear predictor up to the additive constant of ``_eta64``."""
        if X.dtype != np.float32:
            return self._eta64((X - self.mean_) / self.scale_)
        mean, lin, quad, pw = self._c32
        if quad is not None:
            xc = X - mean
            eta = xc @ lin
            eta += np.einsum("ij,ij->i", xc @ quad, xc)
        else:  # uncentred: restore the constant that centring would have removed
            eta = X @ lin
            eta += np.float32(self._c32_const)
        for j, kn, slope, off in pw:
            xj = X[:, j]
            if kn.size <= 12:  # a few comparisons beat a binary search
                seg = (xj > kn[0]).astype(np.intp)
                for t in kn[1:]:
                    seg += xj > t
            else:
                seg = np.searchsorted(kn, xj, side="left")
            eta += slope[seg] * xj + off[seg]
        return eta

    def _predict_chunk(self, X):
        eta = self._eta(X)
        eta += np.asarray(self.offset_, dtype=eta.dtype)
        np.exp(eta, out=eta)
        np.negative(eta, out=eta)
        return -np.expm1(eta)

    def log_density(self, X) -> np.ndarray:
        """Log of the fitted density, normalised to sum 1 over the background rows.

        ``log q(x) = eta(x) - log sum_bg exp(eta)``; differences between cells are log
        ratios of relative intensity.

        Parameters
        ----------
        X : array_like of shape (k, p)

        Returns
        -------
        ndarray of float64, shape (k,)
        """
        check_is_fitted(self)
        X = check_predictors(X, "X", n_features=self.n_features_in_, min_rows=0)
        return self._eta(X.astype(np.float64)) - self._c_log_norm

    def selected_params(self) -> dict:
        """Parameters that refit the chosen model without choosing the penalty again."""
        check_is_fitted(self)
        return {
            "terms": self.terms_,
            "l1_penalty": self.l1_penalty_,
            "feature_classes": None,
            "regularization": None,
        }

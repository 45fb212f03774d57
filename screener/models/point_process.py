"""Maximum-entropy density / Poisson point-process model ("ppm").

Fitted as L1-penalised logistic regression of presences (weight 1) against heavily
weighted background rows, which converges on the Poisson point-process fit as the
background weight grows.  Features are built from predictors standardised on the
background: linear (L), quadratic (Q), pairwise product (P), hinge (H) and threshold (T).
"""

from __future__ import annotations

import logging
import math

import numpy as np
from scipy.special import logsumexp
from sklearn.linear_model import LogisticRegression
from sklearn.utils.validation import check_is_fitted

from screener.errors import InputError
from screener.models.base import NicheModel, check_predictors

__all__ = ["PointProcessNiche", "default_feature_classes", "FEATURE_CLASSES"]

log = logging.getLogger(__name__)

#: The feature-class letters, in the order features are built.
FEATURE_CLASSES = "LQPHT"

#: Nested feature sets tried by ``feature_classes="auto"``, simplest first.
_NESTED_SETS = ("L", "LQ", "LQH", "LQPHT")

#: Penalty per standardised coefficient at multiplier 1, per presence, times 1/sqrt(n).
#: The published per-class values run from about 0.05 to 1 (hinge 0.5, threshold 1-2);
#: 0.5 is our single mid value, since every feature is standardised on the background.
_BASE_PENALTY = 0.5


def default_feature_classes(n_presence: int) -> str:
    """Feature classes for a sample size, as published (Phillips & Dudik 2008).

    ``n < 10``: L; ``10-14``: LQ; ``15-79``: LQH; ``80+``: LQPHT.

    Examples
    --------
    >>> [default_feature_classes(n) for n in (5, 10, 15, 79, 80)]
    ['L', 'LQ', 'LQH', 'LQH', 'LQPHT']
    """
    if n_presence < 10:
        return "L"
    if n_presence < 15:
        return "LQ"
    if n_presence < 80:
        return "LQH"
    return "LQPHT"


def _normalise_classes(fc: str) -> str:
    letters = str(fc).upper()
    bad = sorted(set(letters) - set(FEATURE_CLASSES))
    if bad or not letters:
        raise InputError(
            f"feature_classes={fc!r} is not a set of feature-class letters; use any of "
            f"{'/'.join(FEATURE_CLASSES)} (linear, quadratic, product, hinge, threshold), "
            "e.g. 'LQH', or 'auto'."
        )
    return "".join(c for c in FEATURE_CLASSES if c in letters)


class _FeatureSpace:
    """Feature columns of one feature set over standardised predictors ``z``."""

    def __init__(self, classes: str, knots: list[np.ndarray], p: int):
        self.classes = classes
        self.knots = knots
        self.p = p
        cols = []  # (kind, j, k_or_knot)
        if "L" in classes:
            cols += [("L", j, None) for j in range(p)]
        if "Q" in classes:
            cols += [("Q", j, None) for j in range(p)]
        if "P" in classes:
            cols += [("P", j, k) for j in range(p) for k in range(j + 1, p)]
        if "H" in classes:
            for j in range(p):
                cols += [("Hf", j, t) for t in knots[j]]
                cols += [("Hr", j, t) for t in knots[j]]
        if "T" in classes:
            for j in range(p):
                cols += [("T", j, t) for t in knots[j]]
        self.columns = cols

    def build(self, z: np.ndarray) -> np.ndarray:
        out = np.empty((z.shape[0], len(self.columns)), dtype=np.float64)
        for i, (kind, j, a) in enumerate(self.columns):
            zj = z[:, j]
            if kind == "L":
                out[:, i] = zj
            elif kind == "Q":
                out[:, i] = zj * zj
            elif kind == "P":
                out[:, i] = zj * z[:, a]
            elif kind == "Hf":
                out[:, i] = np.maximum(zj - a, 0.0)
            elif kind == "Hr":
                out[:, i] = np.maximum(a - zj, 0.0)
            else:  # "T"
                out[:, i] = zj > a
        return out


class PointProcessNiche(NicheModel):
    """Maximum-entropy / Poisson point-process niche model (family ``"ppm"``).

    Parameters
    ----------
    feature_classes : str, default "auto"
        Letters from ``"LQPHT"``, or ``"auto"``: try the nested sets L, LQ, LQH, LQPHT
        up to the published default for the sample size (see
        :func:`default_feature_classes`) and keep the best by AICc.
    regularization : float or sequence of float, default (0.5, 1.0, 2.0, 4.0)
        Regularisation multipliers tried (one value fixes it).  The L1 penalty on each
        standardised feature coefficient is ``multiplier * 0.5 / sqrt(n)`` per presence.
    background_weight : float, default 100.0
        Weight of each background row relative to a presence in the logistic fit.
    n_knots : int, default 10
        Hinge and threshold knots per predictor, at background quantiles
        ``1/(n_knots+1), ..., n_knots/(n_knots+1)``.
    max_iter : int, default 1000
        Iteration limit of the liblinear solver.
    random_state : int, default 0
        Seed of the solver's coordinate order (liblinear shuffles; ``None`` would make
        fits irreproducible).

    Attributes
    ----------
    feature_classes_ : str
        Feature classes of the selected model.
    regularization_ : float
        Regularisation multiplier of the selected model.
    aicc_ : float
        AICc of the selected model (inf when every candidate had ``k >= n - 1``).
    n_coefficients_ : int
        Non-zero feature coefficients of the selected model (``k`` in AICc).
    selection_ : list of dict
        Every candidate: feature_classes, regularization, k, log_likelihood, aicc.
    entropy_ : float
        Entropy (nats) of the fitted density over the background rows.
    offset_ : float
        The constant ``c`` in the output ``1 - exp(-exp(eta + c))``.
    mean_, scale_ : ndarray of shape (p,)
        Background mean and standard deviation used to standardise predictors.
    n_features_in_ : int

    Notes
    -----
    *Fit.*  Presences (``y = 1``, weight 1) against background (``y = 0``, weight
    ``background_weight``), L1-penalised logistic regression with the liblinear solver
    (the intercept is scaled by 100 so that its penalty is negligible).  Each feature
    column is standardised over the background; constant columns are dropped.

    *Density and AICc.*  The fitted linear predictor ``eta`` (without intercept)
    defines a density over the background, ``q(x) = exp(eta(x)) / sum_bg exp(eta)``;
    the log-likelihood is ``sum over presences of log q``, ``k`` the number of non-zero
    coefficients, ``AICc = 2k - 2 logL + 2k(k+1)/(n-k-1)`` (infinite when
    ``k >= n - 1``).  The background stands in for the study area's cells in the
    normalisation.

    *Output.*  Complementary log-log: ``1 - exp(-exp(eta + c))`` with
    ``c = H - log sum_bg exp(eta)``, ``H`` the entropy of ``q`` over the background,
    i.e. ``1 - exp(-exp(H) q(x))``, as published for the cloglog output.

    References
    ----------
    .. [1] Phillips, S. J., Anderson, R. P. & Schapire, R. E. (2006). Maximum entropy
       modeling of species geographic distributions. Ecological Modelling 190:231-259.
    .. [2] Phillips, S. J. & Dudik, M. (2008). Ecography 31:161-175 (feature classes,
       regularisation by sample size).
    .. [3] Renner, I. W. & Warton, D. I. (2013). Biometrics 69:274-281 (equivalence of
       maximum-entropy and Poisson point-process models).
    .. [4] Fithian, W. & Hastie, T. (2013). Finite-sample equivalence in statistical
       models for presence-only data. Annals of Applied Statistics 7:1917-1939.
    .. [5] Warren, D. L. & Seifert, S. N. (2011). Ecological Applications 21:335-342
       (model complexity and selection by AICc).
    .. [6] Phillips, S. J. et al. (2017). Ecography 40:887-893 (the complementary
       log-log output).
    """

    accepts_invalid_rows = True

    def __init__(
        self,
        *,
        feature_classes="auto",
        regularization=(0.5, 1.0, 2.0, 4.0),
        background_weight: float = 100.0,
        n_knots: int = 10,
        max_iter: int = 1000,
        random_state=0,
    ):
        self.feature_classes = feature_classes
        self.regularization = regularization
        self.background_weight = background_weight
        self.n_knots = n_knots
        self.max_iter = max_iter
        self.random_state = random_state

    # --- fitting ----------------------------------------------------------------------
    def _candidates(self, n: int):
        if (
            isinstance(self.feature_classes, str)
            and self.feature_classes.lower() == "auto"
        ):
            top = default_feature_classes(n)
            sets = list(_NESTED_SETS[: _NESTED_SETS.index(top) + 1])
        else:
            sets = [_normalise_classes(self.feature_classes)]
        regs = np.atleast_1d(np.asarray(self.regularization, dtype=float))
        if regs.size == 0 or not np.all(np.isfinite(regs)) or np.any(regs <= 0):
            raise InputError(
                f"regularization={self.regularization!r}: use one or more positive "
                "multipliers, e.g. 1.0 or (0.5, 1, 2, 4)."
            )
        return sets, [float(r) for r in regs]

    def fit(self, presence, background):
        """Fit every candidate feature set x multiplier and keep the lowest AICc.

        Parameters
        ----------
        presence : array_like of shape (n, p)
        background : array_like of shape (m, p)

        Returns
        -------
        self
        """
        presence, background = self._check_fit_inputs(presence, background)
        if self.background_weight <= 0 or self.n_knots < 1:
            raise InputError(
                "background_weight must be > 0 and n_knots >= 1; got "
                f"{self.background_weight!r} and {self.n_knots!r}."
            )
        presence = presence.astype(np.float64)
        background = background.astype(np.float64)
        n, p = presence.shape
        sets, regs = self._candidates(n)
        mean = background.mean(axis=0)
        scale = background.std(axis=0)
        scale = np.where(scale > 0, scale, 1.0)
        zp = (presence - mean) / scale
        zb = (background - mean) / scale
        levels = np.arange(1, self.n_knots + 1) / (self.n_knots + 1)
        knots = [np.unique(np.quantile(zb[:, j], levels)) for j in range(p)]

        y = np.r_[np.ones(n), np.zeros(zb.shape[0])]
        w = np.r_[np.ones(n), np.full(zb.shape[0], float(self.background_weight))]
        fits = []
        for fc in sets:
            space = _FeatureSpace(fc, knots, p)
            F = np.vstack([space.build(zp), space.build(zb)])
            fs = F[n:].std(axis=0)
            keep = fs > 1e-12
            if not np.any(keep):
                continue
            fs = fs[keep]
            Fs = (F[:, keep] - F[n:, keep].mean(axis=0)) / fs
            for reg in regs:
                beta, loglik, k = self._fit_candidate(Fs, y, w, n, reg)
                aicc = (
                    2 * k - 2 * loglik + 2 * k * (k + 1) / (n - k - 1)
                    if n - k - 1 > 0
                    else math.inf
                )
                fits.append(
                    {
                        "feature_classes": fc,
                        "regularization": reg,
                        "k": k,
                        "log_likelihood": loglik,
                        "aicc": aicc,
                        "_model": (space, keep, fs, beta),
                    }
                )
        if not fits:
            raise InputError(
                "Every predictor is constant over the background, so the point-process "
                "model has nothing to fit; check the layers and the accessible area."
            )
        finite = [f for f in fits if math.isfinite(f["aicc"])]
        if finite:
            # Lowest AICc; ties go to the simpler feature set, then the larger multiplier.
            chosen = min(
                finite,
                key=lambda f: (
                    f["aicc"],
                    len(f["feature_classes"]),
                    -f["regularization"],
                ),
            )
        else:
            # No candidate has k < n - 1, so AICc is undefined: keep the simplest set at
            # the strongest regularisation.
            chosen = min(
                fits, key=lambda f: (len(f["feature_classes"]), -f["regularization"])
            )
            log.info(
                "AICc undefined for every candidate (n=%d); using %s at %.3g",
                n,
                chosen["feature_classes"],
                chosen["regularization"],
            )
        self._finish(*chosen["_model"], mean, scale, zb)
        self.feature_classes_ = chosen["feature_classes"]
        self.regularization_ = chosen["regularization"]
        self.aicc_ = float(chosen["aicc"])
        self.n_coefficients_ = chosen["k"]
        self.selection_ = [{k: v for k, v in f.items() if k != "_model"} for f in fits]
        return self

    def _fit_candidate(self, Fs, y, w, n, reg):
        """One penalised fit: coefficients, presence log-likelihood, non-zero count."""
        clf = LogisticRegression(
            l1_ratio=1.0,
            solver="liblinear",
            C=1.0 / (reg * _BASE_PENALTY * math.sqrt(n)),
            intercept_scaling=100.0,
            max_iter=self.max_iter,
            tol=1e-6,
            random_state=self.random_state,
        )
        clf.fit(Fs, y, sample_weight=w)
        beta = clf.coef_[0].copy()
        eta = Fs @ beta
        loglik = float((eta[:n] - logsumexp(eta[n:])).sum())
        return beta, loglik, int(np.count_nonzero(beta))

    def _finish(self, space, keep, fs, beta, mean, scale, zb):
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
            if kind == "L":
                lin[j] += c
            elif kind == "Q":
                quad[j, j] += c
            elif kind == "P":
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
                if kind == "Hf":  # c * max(z - a, 0), active when z > a
                    act = seg > i
                    slope[act] += c
                    off[act] -= c * a
                elif kind == "Hr":  # c * max(a - z, 0), active when z <= a
                    act = seg <= i
                    slope[act] -= c
                    off[act] += c * a
                else:  # threshold c * (z > a)
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
        q = np.exp(eta_bg - log_z)
        entropy = float(-np.sum(q * (eta_bg - log_z)))
        self.entropy_ = entropy
        self._c_log_norm = log_z
        self.offset_ = entropy - log_z
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
        """Parameters that refit the selected model without re-running selection."""
        check_is_fitted(self)
        return {
            "feature_classes": self.feature_classes_,
            "regularization": self.regularization_,
        }

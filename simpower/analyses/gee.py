"""Generalised estimating equations (GEE): statsmodels per replicate, Fisher scoring on batches.

Model (Liang & Zeger 1986): the marginal mean of an outcome ``y_ij`` of member j of
group i (a cluster, or a subject's visits) is ``g^-1(x_ij' beta)``, with ``g`` the
identity (gaussian), logit (binomial) or log (poisson) link, variance
``phi v(mu)`` and a working correlation ``R_i(alpha)`` within groups
(independence, or exchangeable: one correlation ``alpha`` between any two members).
``beta`` solves ``sum_i D_i' V_i^-1 (y_i - mu_i) = 0`` with ``D_i = d mu_i / d beta``
and ``V_i = A_i^1/2 R_i A_i^1/2``, ``A_i = diag v(mu_ij)``.

The per-replicate path calls :class:`statsmodels.genmod.generalized_estimating_equations.GEE`
(``statsmodels.api.GEE``). The batch path repeats statsmodels' own algorithm for all
replicates at once (numpy arrays with a leading replicate axis), so the two agree to
rounding:

* start: the independence GLM fitted by IRLS (statsmodels ``GLM.fit``: start
  ``mu = (y + 0.5) / 2`` (binomial) or ``(y + mean(y)) / 2``, stop when the deviance
  changes by at most 1e-8, at most 100 iterations; for the gaussian family this is OLS);
* iteration (``GEE.fit``, ``maxiter`` 60, ``ctol`` 1e-6): a Fisher scoring step
  ``beta += B^-1 U`` with ``B = sum D_i' V_i^-1 D_i`` and score ``U = sum D_i' V_i^-1 r_i``;
  stop when ``|U| < 1e-6`` (the score before the step) once the working correlation has
  been updated at least once; otherwise update it at the new means. Every group of one
  member: no correlation update (statsmodels' rule);
* exchangeable correlation (statsmodels ``Exchangeable.update``), with Pearson residuals
  ``e_ij = (y_ij - mu_ij) / sqrt(v(mu_ij))``, N observations, P pairs within groups and p
  coefficients: ``phi = sum e^2 / (N - p)`` and
  ``alpha = sum_i sum_{j<k} e_ij e_ik / phi / (P - p)``;
* covariances at the final estimate, with ``M_i = D_i' V_i^-1 D_i`` and
  ``u_i = D_i' V_i^-1 r_i`` (the group's contributions to ``B`` and ``U``):
  robust (Liang & Zeger 1986) ``B^-1 (sum u_i u_i') B^-1``; Mancl & DeRouen (2001)
  ``B^-1 (sum D_i' V_i^-1 (I - H_i)^-1 r_i r_i' (I - H_i')^-1 V_i^-1 D_i) B^-1`` with
  ``H_i = D_i B^-1 D_i' V_i^-1``, which equals ``sum (B - M_i)^-1 u_i u_i' (B - M_i)^-1``
  (Woodbury identity; statsmodels' ``bias_reduced``); Kauermann & Carroll (2001) with
  ``(I - H_i)^-1/2`` in place of ``(I - H_i)^-1`` (the principal square root; see
  :func:`kauermann_carroll_cov`). On batches, with ``B = C C'`` and
  ``C^-1 M_i C^-T = Q diag(lam) Q'``, ``D_i' V_i^-1 (I - H_i)^-1/2 r_i = u_i + M_i C^-T Q diag(f) Q' C^-1 u_i``
  with ``f = ((1 - lam)^-1/2 - 1) / lam``: p x p algebra per group.

The replicates of a batch are fitted in blocks (about 32,000 outcome values each), so the
temporaries stay in the processor's cache; a group sum is a product with a sparse
group-by-coefficient matrix when the design and groups are shared by every replicate, else a
``bincount``. Replicates the batch path cannot settle the way statsmodels would (the
iteration limit reached, a singular or nearly singular ``B``, a working correlation matrix
near singular, separation in the starting GLM, a visit without observations, a group
leverage of 1...) are handed to the per-replicate path, so their values and fit trouble
(statsmodels' warnings, recorded per replicate) are statsmodels' own.
"""

from __future__ import annotations

import math

import numpy as np
from scipy import special, stats

from .._validation import Anything, Choice, Int
from ..errors import ParameterError
from ..formula import FormulaText, require_columns
from .base import ALTERNATIVE, CI_LEVEL, Analysis, BatchResult, TestResult, hand_over
from .numeric import p_from_t, p_from_z

FAMILIES = ("gaussian", "binomial", "poisson")
COV_TYPES = ("robust", "bias_reduced", "mancl_derouen", "kauermann_carroll")
#: statsmodels' GEE.fit default stopping tolerance on the norm of the score
CTOL = 1e-6
#: statsmodels' GLM IRLS defaults (deviance change, iterations)
GLM_TOL, GLM_MAXITER = 1e-8, 100
EPS = np.finfo(float).eps
#: smallest eigenvalue of B, relative to its largest, below which a replicate goes to statsmodels
RCOND = 1e-10
#: outcome values (replicates x rows) per block of replicates fitted together
BLOCK_ROWS = 2**15
#: replicate rows (x coefficients^2) per block when per-group outer products are summed
BLOCK_VALUES = 4_000_000


# -- families: the link and variance functions as statsmodels evaluates them ---------------------
def _mean_parts(family: str, eta):
    """``mu``, ``d mu / d eta`` and the variance function ``v(mu)`` (statsmodels' links and varfuncs)."""
    if family == "gaussian":
        one = np.ones_like(eta)
        return eta, one, one
    if family == "binomial":
        e = np.exp(-eta)
        mu = 1.0 / (1.0 + e)
        p = np.clip(mu, EPS, 1.0 - EPS)
        return mu, e * mu * mu, p * (1.0 - p)     # exp(eta) / (1 + exp(eta))^2 = e mu^2
    mu = np.exp(eta)
    return mu, mu, np.abs(mu)


def _mean(family: str, eta):
    """``mu`` alone, computed exactly as :func:`_mean_parts` computes it."""
    if family == "gaussian":
        return eta
    if family == "binomial":
        return 1.0 / (1.0 + np.exp(-eta))
    return np.exp(eta)


def _irls_parts(family: str, mu):
    """IRLS weights ``1 / (g'(mu)^2 v(mu))`` and ``g'(mu)`` of statsmodels' GLM (clipped as there)."""
    if family == "binomial":
        p = np.clip(mu, EPS, 1.0 - EPS)
        w = p * (1.0 - p)
        return w, 1.0 / w
    d = 1.0 / np.clip(mu, EPS, np.inf)
    return 1.0 / (d**2 * np.abs(mu)), d


def _link(family: str, mu):
    if family == "binomial":
        p = np.clip(mu, EPS, 1.0 - EPS)
        return np.log(p / (1.0 - p))
    return np.log(np.clip(mu, EPS, np.inf))


def _deviance(family: str, y, mu, obs):
    """Deviance per replicate (statsmodels' ``_resid_dev`` with its clipping), observed rows only (``obs``
    None: every row)."""
    if family == "binary":             # 0/1 outcomes: the same terms, one log per value
        terms = np.log(np.where(y > 0.5, mu + 1e-20, 1.0 - mu + 1e-20))
        return -2.0 * (terms if obs is None else np.where(obs, terms, 0.0)).sum(axis=1)
    if family == "binomial":
        a = np.clip(y / (mu + 1e-20), EPS, np.inf)
        b = np.clip((1.0 - y) / (1.0 - mu + 1e-20), EPS, np.inf)
        d = y * np.log(a) + (1 - y) * np.log(b)
    else:
        d = y * np.log(np.clip(y / mu, EPS, np.inf)) - (y - mu)
    return 2.0 * (d if obs is None else np.where(obs, d, 0.0)).sum(axis=1)


# -- designs: the sums the fit needs, for shared or per-replicate design columns ----------------
class _SharedDesign:
    """Design X (N, p) and group ids (N,) shared by every replicate: group sums as sparse products.

    Every sum the fit needs is a product of per-row weights (r, N) with a fixed matrix: ``X``,
    the rows' outer products ``x x'``, or the same spread over the groups (sparse, N nonzeros per
    column block), so each is one call into compiled code.
    """

    def __init__(self, X, codes):
        from scipy import sparse

        N, p = X.shape
        labels, inv = np.unique(np.asarray(codes), return_inverse=True)
        self.G, self.p, self.X = int(labels.size), p, X
        self.XX = (X[:, :, None] * X[:, None, :]).reshape(N, p * p)

        def spread(values, width):     # (N, width) values -> sparse (G * width, N), row g * width + j
            cols = inv[:, None] * width + np.arange(width)
            m = sparse.csr_matrix((values.ravel(), (np.repeat(np.arange(N), width), cols.ravel())),
                                  shape=(N, self.G * width))
            return m.T.tocsr()

        self.Sg, self.S1, self.S2 = spread(np.ones((N, 1)), 1), spread(X, p), spread(self.XX, p * p)

    def eta(self, beta, rows):
        return beta @ self.X.T

    def xtw(self, v, rows):                  # sum_n v_n x_n -> (r, p)
        return v @ self.X

    def xtwx(self, w, rows):                 # sum_n w_n x_n x_n' -> (r, p, p)
        return (w @ self.XX).reshape(-1, self.p, self.p)

    def gsum(self, v, rows):                 # per group sum_n v_n -> (r, G)
        return (self.Sg @ v.T).T

    def gx(self, w, rows):                   # per group sum_n w_n x_n -> (r, G, p)
        return (self.S1 @ w.T).T.reshape(-1, self.G, self.p)

    def gxx(self, w, rows):                  # per group sum_n w_n x_n x_n' -> (r, G, p, p)
        return (self.S2 @ w.T).T.reshape(-1, self.G, self.p, self.p)


class _RowDesign:
    """Design X (R, N, p) and group ids (N,) or (R, N) per replicate: group sums by ``bincount``."""

    def __init__(self, X, codes):
        labels, inv = np.unique(np.asarray(codes), return_inverse=True)
        self.codes, self.G, self.X, self.p = inv.reshape(np.shape(codes)), int(labels.size), X, X.shape[-1]

    def _flat(self, rows):
        codes = self.codes if self.codes.ndim == 2 else np.broadcast_to(self.codes, self.X.shape[:2])
        codes = codes[rows]
        return (codes + self.G * np.arange(codes.shape[0])[:, None]).ravel()

    def _sums(self, values, rows):           # values (r, N, k) -> (r, G, k)
        flat, r = self._flat(rows), values.shape[0]
        cols = [np.bincount(flat, values[..., j].ravel(), r * self.G) for j in range(values.shape[-1])]
        return np.stack(cols, axis=-1).reshape(r, self.G, -1)

    def eta(self, beta, rows):
        return np.einsum("rnp,rp->rn", self.X[rows], beta)

    def xtw(self, v, rows):
        return np.einsum("rnp,rn->rp", self.X[rows], v)

    def xtwx(self, w, rows):
        X = self.X[rows]
        return np.swapaxes(X * w[..., None], 1, 2) @ X

    def gsum(self, v, rows):
        return self._sums(v[..., None], rows)[..., 0]

    def gx(self, w, rows):
        return self._sums(self.X[rows] * w[..., None], rows)

    def gxx(self, w, rows):
        X = self.X[rows]
        xx = (X[..., :, None] * X[..., None, :]).reshape(X.shape[:2] + (self.p * self.p,))
        return self._sums(xx * w[..., None], rows).reshape(-1, self.G, self.p, self.p)


# -- the default design ----------------------------------------------------------------------
def default_design(arm, visit=None):
    """The default mean model's columns and names: intercept + arm, or, with several visits,
    intercept, arm, then per visit v other than the last ``visit[v]`` and ``arm:visit[v]``
    (the final visit is the reference level, so ``arm`` is the difference there)."""
    arm = np.asarray(arm, float)
    cols, names = [np.ones(arm.shape), arm], ["Intercept", "arm"]
    if visit is not None:
        levels = np.unique(visit)
        for v in levels[:-1] if levels.size > 1 else ():
            ind = (visit == v).astype(float)
            cols += [ind, ind * arm]
            names += [f"visit[{v}]", f"arm:visit[{v}]"]
    return np.stack(cols, axis=-1), names


# -- Kauermann-Carroll, one fit at a time --------------------------------------------------------
def kauermann_carroll_cov(D, V, r):
    """Kauermann & Carroll's (2001) bias-corrected sandwich from per-group arrays (one data set).

    ``cov = B^-1 [sum_i D_i' V_i^-1 A_i r_i r_i' A_i' V_i^-1 D_i] B^-1`` with
    ``B = sum_i D_i' V_i^-1 D_i``, ``H_i = D_i B^-1 D_i' V_i^-1`` and ``A_i = (I - H_i)^-1/2``, the
    principal inverse square root. ``H_i = U_i S_i'`` with ``U_i = D_i C^-T``,
    ``S_i' = C^-1 D_i' V_i^-1`` (``B = C C'``), and ``S_i' U_i = K_i = Q diag(lam) Q'`` is symmetric,
    so the power series of ``(1 - x)^-1/2`` gives ``A_i = I + U_i Q diag(f(lam)) Q' S_i'`` with
    ``f(lam) = ((1 - lam)^-1/2 - 1) / lam``. ``D``, ``V``, ``r``: lists of the groups' ``D_i``
    (n_i, p), working covariances ``V_i`` (n_i, n_i) and residuals ``r_i`` (n_i,). Raises
    ``ValueError`` when some ``lam >= 1`` (a group that alone determines a coefficient).
    """
    VinvD = [np.linalg.solve(v, d) for d, v in zip(D, V)]
    B = sum(d.T @ w for d, w in zip(D, VinvD))
    try:
        C = np.linalg.cholesky(B)
    except np.linalg.LinAlgError:
        raise ValueError("the Kauermann-Carroll correction is undefined: sum D_i' V_i^-1 D_i is not positive "
                         "definite (an estimated working correlation that is not a correlation matrix)") from None
    Binv = np.linalg.inv(B)
    meat = np.zeros_like(B)
    for d, w, res in zip(D, VinvD, r):
        U = np.linalg.solve(C, d.T).T                   # D_i C^-T
        St = np.linalg.solve(C, w.T)                    # C^-1 D_i' V_i^-1
        lam, Q = np.linalg.eigh(St @ U)
        if np.any(lam >= 1):
            raise ValueError("the Kauermann-Carroll correction is undefined: a group's leverage I - H_i is not "
                             "positive definite (a group alone determines a coefficient)")
        s = np.sqrt(1.0 - lam)
        adj = res + U @ (Q @ ((Q.T @ (St @ res)) / (s * (1.0 + s))))   # (I - H_i)^-1/2 r_i
        u = w.T @ adj                                                    # D_i' V_i^-1 (I - H_i)^-1/2 r_i
        meat += np.outer(u, u)
    return Binv @ meat @ Binv


def _kc_from_statsmodels(res) -> np.ndarray:
    """The Kauermann-Carroll covariance of a fitted statsmodels GEE (its final means and correlation)."""
    model = res.model
    params = np.asarray(res.params, float)
    D, V, r = [], [], []
    for i in range(model.num_group):
        X, y = model.exog_li[i], model.endog_li[i]
        lpr = X @ params
        if model.offset_li is not None:
            lpr = lpr + model.offset_li[i]
        mu = model.family.link.inverse(lpr)
        sd = np.sqrt(model.family.variance(mu))
        corr, is_cor = model.cov_struct.covariance_matrix(mu, i)
        D.append(model.mean_deriv(X, lpr))
        V.append(corr * np.outer(sd, sd) if is_cor else corr)
        r.append(y - mu)
    return kauermann_carroll_cov(D, V, r)


# -- the analysis ----------------------------------------------------------------------------
class GEE(Analysis):
    """GEE with robust or small-sample corrected SEs (statsmodels), groups = cluster (or subject).

    Parameters
    ----------
    formula : str, optional
        The mean model, e.g. ``"y ~ arm + baseline"``, in the grammar of
        :mod:`simpower.formula` (checked at construction: column names,
        ``C(column)``, ``a:b``, ``a*b``; nothing that runs code).
        Default: ``y ~ arm`` for cluster data; for repeated data (a ``visit``
        column) visit as a factor crossed with arm, with the final visit as
        the reference level, so the ``arm`` coefficient is the treatment
        difference at the final visit.
    term : str
        The coefficient tested and reported (default ``"arm"``).
    family : {"gaussian", "binomial", "poisson"}
        Identity link (default), logit link (0/1 outcomes: ``arm`` is a log odds
        ratio) or log link (counts: a log rate ratio). The binomial and Poisson
        scale is fixed at 1 (statsmodels' rule); the robust SEs do not use it.
    cov_struct : {"exchangeable", "independence"}
        Working correlation within groups.
    cov_type : {"robust", "bias_reduced", "mancl_derouen", "kauermann_carroll"}
        Sandwich SEs (Liang & Zeger 1986); the Mancl & DeRouen (2001) bias-reduced
        sandwich ("bias_reduced", statsmodels' name, and "mancl_derouen" are the same);
        or the Kauermann & Carroll (2001) correction, which inflates each group's
        residuals by ``(I - H_i)^-1/2`` instead of ``(I - H_i)^-1`` (less than
        Mancl-DeRouen; with one observation per group and independence it is the
        HC2 correction of linear regression).
    distribution : {"normal", "t"}
        Reference distribution of the Wald statistic: normal (statsmodels' default) or
        t with (groups - coefficients) df (clusters - 2 for the default cluster model).
        Li & Redden (2015, Statistics in Medicine 34:281-296) compare these choices for
        cluster trials with few clusters and binary outcomes: the uncorrected sandwich
        with a normal reference rejects too often; the Mancl-DeRouen or
        Kauermann-Carroll SE with t(clusters - 2) keeps the type I error near alpha
        (Kauermann-Carroll when clusters vary in size little, Mancl-DeRouen slightly
        conservative).
    maxiter : int >= 1
        Iteration limit of the GEE fit; hitting it warns (recorded per replicate).
    alternative, ci_level
        As elsewhere; H1 "greater": coefficient > 0.

    Notes
    -----
    H0: the ``term`` coefficient is 0 (for the defaults, no difference between
    arms, at the final visit for repeated data). Groups are ``cluster`` when
    the table has that column, else ``subject``. Rows with missing ``y`` are
    dropped: valid under missingness completely at random only. Fit warnings
    (``ConvergenceWarning``, ``IterationLimitWarning``...) are not silenced.
    With the default mean model (``formula`` unset, ``term = "arm"``) a batch of
    cluster or repeated-measures data is fitted for all replicates at once (see
    :mod:`simpower.analyses.gee`); a user formula is fitted replicate by replicate.
    """

    name = "gee"
    null_hypothesis = "the coefficient of `term` (default: arm, at the final visit for repeated data) is 0"
    params = {"formula": FormulaText(optional=True), "term": Anything(),
              "family": Choice(FAMILIES, optional=True),
              "cov_struct": Choice(("exchangeable", "independence")),
              "cov_type": Choice(COV_TYPES), "distribution": Choice(("normal", "t")),
              "maxiter": Int(low=1), "alternative": ALTERNATIVE, "ci_level": CI_LEVEL}
    # family None is the gaussian family: stored so, the specs (and seeds) of earlier gee scenarios stay as they were
    defaults = {"formula": None, "term": "arm", "family": None, "cov_struct": "exchangeable", "cov_type": "robust",
                "distribution": "normal", "maxiter": 60, "alternative": "two-sided", "ci_level": 0.95}

    def _check(self):
        if not isinstance(self.term, str) or not self.term:
            raise ParameterError(f"`term` must be a coefficient name such as 'arm'; got {self.term!r}.")
        if self.family == "gaussian":
            self._set_params({**self._p, "family": None})

    @property
    def family_name(self) -> str:
        """The family: "gaussian", "binomial" or "poisson"."""
        return self.family or "gaussian"

    @property
    def estimand_label(self):
        """The arm coefficient is a log odds ratio (binomial) or log rate ratio (poisson)."""
        return {"binomial": "log odds ratio", "poisson": "log rate ratio"}.get(self.family_name)

    def _structure(self):
        from statsmodels.genmod import cov_struct

        return cov_struct.Exchangeable() if self.cov_struct == "exchangeable" else cov_struct.Independence()

    def _family(self):
        from statsmodels.genmod import families

        return {"gaussian": families.Gaussian, "binomial": families.Binomial,
                "poisson": families.Poisson}[self.family_name]()

    @property
    def _sm_cov_type(self) -> str:
        return "bias_reduced" if self.cov_type in ("bias_reduced", "mancl_derouen") else "robust"

    # -- per replicate (statsmodels) -------------------------------------------------------------
    def fit(self, data):
        """The statsmodels GEE results object for one long table."""
        return self._fit(data)[0]

    def _fit(self, data):
        """The statsmodels GEE results object for one long table, and the coefficient names."""
        # the module itself, not statsmodels.api (whose import pulls in much more)
        from statsmodels.genmod.generalized_estimating_equations import GEE as StatsmodelsGEE

        group_col = "cluster" if "cluster" in data else "subject" if "subject" in data else None
        if group_col is None:
            raise ValueError("gee needs a 'cluster' or 'subject' column to define groups")
        if self.formula is None:
            y = np.asarray(data["y"], float)
            keep = np.isfinite(y)
            visit = np.asarray(data["visit"])[keep] if "visit" in data else None
            X, names = default_design(np.asarray(data["arm"])[keep], visit)
            model = StatsmodelsGEE(y[keep], X, groups=np.asarray(data[group_col])[keep], family=self._family(),
                           cov_struct=self._structure())
        else:
            import pandas as pd

            df = pd.DataFrame({k: np.asarray(v) for k, v in dict(data).items()})
            df = df[np.isfinite(df["y"].to_numpy(float))]
            require_columns(self.formula, df.columns, "gee")
            model = StatsmodelsGEE.from_formula(self.formula, groups=group_col, data=df, family=self._family(),
                                        cov_struct=self._structure())
            names = list(model.exog_names)
        res = model.fit(maxiter=self.maxiter, cov_type=self._sm_cov_type)
        if res is None:  # statsmodels warned (singular covariance...) and gave up
            raise ValueError("the GEE fit returned no estimates (singular covariance of the estimates)")
        return res, names

    def __call__(self, data) -> TestResult:
        res, names = self._fit(data)
        if self.term not in names:
            from ..errors import nearest

            raise ValueError(f"`term` {self.term!r} is not a coefficient of the GEE model.{nearest(self.term, names)}")
        j = names.index(self.term)
        est = float(np.asarray(res.params)[j])
        if self.cov_type == "kauermann_carroll":
            se = float(np.sqrt(_kc_from_statsmodels(res)[j, j]))
        else:
            se = float(np.asarray(res.bse)[j])
        df = math.inf if self.distribution == "normal" else float(len(np.unique(res.model.groups)) - len(names))
        out = self._fields(np.float64(est), np.float64(se), np.float64(df))
        return TestResult(**{k: float(v) for k, v in out.items()}, statistic=est / se, df=df)

    def _fields(self, est, se, df):
        """p-value and two-sided interval of ``est / se`` (normal, or t with ``df``); arrays allowed."""
        with np.errstate(all="ignore"):
            z = est / se
            if self.distribution == "normal":
                p = p_from_z(z, self.alternative)
                crit = special.ndtri(0.5 + self.ci_level / 2)
            else:
                p = p_from_t(z, df, self.alternative)
                crit = stats.t.ppf(0.5 + self.ci_level / 2, df)
            return {"pvalue": p, "estimate": est, "se": se, "ci_low": est - crit * se, "ci_high": est + crit * se}

    # -- batch ---------------------------------------------------------------------------------
    layouts = ("longitudinal", "clustered")

    def _supports(self, layout):
        """The default mean model; repeated data with a shared visit design; numeric arms."""
        if self.formula is not None or self.term != "arm":
            return False
        arm = layout.column("arm")
        if arm is None or not np.issubdtype(np.asarray(arm).dtype, np.number):
            return False
        if layout.kind == "longitudinal":
            groups = layout.column("cluster") if "cluster" in layout else layout.subject
            return groups is not None and "visit" in layout.shared and np.ndim(arm) == 1
        return "visit" not in layout   # a visit column would change the per-replicate design

    def batch(self, batch):
        layout = self.batch_layout(batch)
        y = np.asarray(layout.y, float)
        R, N = y.shape
        obs = np.asarray(layout.observed, bool)
        arm = np.asarray(layout.column("arm"), float)
        visit = None
        if layout.kind == "longitudinal":
            visit = np.asarray(layout.shared["visit"])
            groups = layout.column("cluster") if "cluster" in layout else layout.subject
        else:
            groups = layout.cluster
        if arm.ndim == 1:
            X, _ = default_design(arm, visit)              # (N, p)
        else:
            X, _ = default_design(np.broadcast_to(arm, (R, N)), None)
        groups = np.asarray(groups)
        shared = _SharedDesign(X, groups) if X.ndim == 2 and groups.ndim == 1 else None
        bad = np.zeros(R, bool)
        if visit is not None and np.unique(visit).size > 1:
            # a visit without observed outcomes changes the per-replicate design: statsmodels decides
            per_visit = np.stack([obs[:, visit == v].any(axis=1) for v in np.unique(visit)], axis=1)
            bad |= ~per_visit.all(axis=1)
        est, se, df = np.empty(R), np.empty(R), np.empty(R)
        step = max(1, BLOCK_ROWS // N)           # blocks of replicates: temporaries stay in cache
        for lo in range(0, R, step):
            blk = slice(lo, min(R, lo + step))
            design = shared or _RowDesign(np.broadcast_to(X, (R,) + X.shape[-2:])[blk],
                                          groups[blk] if groups.ndim == 2 else groups)
            fit = _GeeBatch(self.family_name, self.cov_struct, design, y[blk], obs[blk], self.maxiter)
            bad[blk] |= fit.run()
            b, cov = fit.estimate_and_cov(self.cov_type, bad[blk])
            est[blk], se[blk] = b[:, 1], np.sqrt(cov[:, 1, 1])
            df[blk] = fit.n_groups - X.shape[-1]
        out = BatchResult(**self._fields(est, se, df))
        bad |= ~(np.isfinite(out.pvalue) & np.isfinite(se) & np.isfinite(out.estimate) & (se > 0))
        return hand_over(self, batch, out, bad)


class _GeeBatch:
    """statsmodels' GEE fit (start, iteration, stopping rule, covariances) for R replicates at once."""

    def __init__(self, family, cov_struct, design, y, obs, maxiter):
        self.family, self.exchangeable, self.maxiter = family, cov_struct == "exchangeable", maxiter
        self.design, self.obs = design, obs
        self.every = bool(obs.all())  # every row observed: masks need not be applied
        self.y = np.where(obs, y, 0.0)
        R = y.shape[0]
        self.p = design.p
        rows = np.arange(R)
        self.k = design.gsum(obs.astype(float), rows)              # (R, G) observed members
        self.n_obs = obs.sum(axis=1).astype(float)
        self.n_groups = (self.k > 0).sum(axis=1)
        self.n_pairs = (0.5 * self.k * (self.k - 1)).sum(axis=1)
        self.update_dep = self.k.max(axis=1) > 1                   # statsmodels: no update with singletons
        self.beta = np.zeros((R, self.p))
        self.alpha = np.zeros(R)
        # outcomes statsmodels' family would refuse or warn about: its own path decides
        if family == "binomial":
            self.bad = np.any(obs & ((y < 0) | (y > 1)), axis=1)
        elif family == "poisson":
            self.bad = np.any(obs & (y < 0), axis=1)
        else:
            self.bad = np.zeros(R, bool)
        self.bad |= self.n_groups < 1

    def _eta(self, rows, beta):
        return self.design.eta(beta, rows)

    def _wls(self, rows, w, z):
        """Weighted least squares per replicate: ``(X'WX)^-1 X'Wz`` and whether it was well posed."""
        return _solve_sym(self.design.xtwx(w, rows), self.design.xtw(w * z, rows))

    # -- the independence GLM (statsmodels' GLM.fit, IRLS) as starting values
    def start(self):
        R = self.y.shape[0]
        rows = np.arange(R)
        obs = self.obs
        if self.family == "gaussian":
            self.beta, ok = self._wls(rows, obs.astype(float), self.y)
            self.bad |= ~ok
            return
        y = self.y
        if self.family == "binomial":
            mu = (y + 0.5) / 2
        else:
            with np.errstate(all="ignore"):
                ybar = y.sum(axis=1) / self.n_obs
            mu = (y + ybar[:, None]) / 2
        eta = _link(self.family, mu)
        kind = "binary" if self.family == "binomial" and np.all((y == 0) | (y == 1)) else self.family
        dev_old = _deviance(kind, y, mu, obs)
        done = np.zeros(R, bool)
        every = self.every  # no masking needed: np.where(obs, x, 0) is x itself
        for _ in range(GLM_MAXITER):
            idx = np.flatnonzero(~done & ~self.bad)
            if idx.size == 0:
                break
            sel = slice(None) if idx.size == R else idx  # all replicates: views instead of copies
            y_s, mu_s, obs_s = y[sel], mu[sel], obs[sel]
            w, d = _irls_parts(self.family, mu_s)
            z = eta[sel] + d * (y_s - mu_s)
            if not every:
                w, z = np.where(obs_s, w, 0.0), np.where(obs_s, z, 0.0)
            beta, ok = self._wls(idx, w, z)
            self.bad[idx[~ok]] = True
            self.beta[sel] = beta
            eta_s = self._eta(idx, beta)
            eta[sel] = eta_s
            mu_s = _mean(self.family, eta_s)
            mu[sel] = mu_s
            dev = _deviance(kind, y_s, mu_s, None if every else obs_s)
            # statsmodels warns of perfect separation when every fitted mean is within 1e-8 of its outcome
            far = np.abs(mu_s - y_s) > 1e-8
            sep = ~np.any(far if every else obs_s & far, axis=1)
            self.bad[idx[sep]] = True
            conv = np.abs(dev - dev_old[sel]) <= GLM_TOL
            dev_old[sel] = dev
            done[idx[conv]] = True
        self.bad |= ~done

    # -- one replicate set's moments at ``beta``
    def moments(self, rows, beta, alpha, per_group=False, update=None):
        """Group sums at ``beta`` for replicates ``rows``: B, U, the exchangeable pieces, and optionally M_i, u_i.

        ``update`` (mask over ``rows``): first re-estimate the exchangeable correlation of those
        replicates at these means (written to ``self.alpha``), as statsmodels does between steps.
        """
        eta = self._eta(rows, beta)
        mu, dmu, v = _mean_parts(self.family, eta)
        sd = np.sqrt(v)
        w, r1 = dmu / sd, (self.y[rows] - mu) / sd                  # rows of D scaled by 1 / sd; Pearson residuals
        if not self.every:
            obs = self.obs[rows]
            w, r1 = np.where(obs, w, 0.0), np.where(obs, r1, 0.0)
        d = self.design
        sD = d.gx(w, rows)                                           # (r, G, p)
        sr = d.gsum(r1, rows)                                        # (r, G)
        rr = np.einsum("rn,rn->r", r1, r1)
        if update is not None and update.any():
            alpha = alpha.copy()
            alpha[update] = self._alpha(rows, sr, rr)[update]
            self.alpha[rows] = alpha
        k = self.k[rows]
        a = alpha[:, None]
        with np.errstate(all="ignore"):
            c = np.where(k > 0, a / (1.0 - a) / (1.0 + a * (k - 1.0)), 0.0)     # statsmodels' solve
        inv1 = 1.0 / (1.0 - alpha)
        out = {"eta": eta, "alpha": alpha}
        cs = c[..., None] * sD
        if per_group:
            M = d.gxx(w * w, rows) * inv1[:, None, None, None] - cs[..., :, None] * sD[..., None, :]
            u = d.gx(w * r1, rows) * inv1[:, None, None] - cs * sr[..., None]
            out.update(M=M, u=u, B=M.sum(axis=1), U=u.sum(axis=1))
        else:
            out["B"] = d.xtwx(w * w, rows) * inv1[:, None, None] - np.swapaxes(cs, 1, 2) @ sD
            out["U"] = d.xtw(w * r1, rows) * inv1[:, None] - np.einsum("rgp,rg->rp", cs, sr)
        return out

    def _alpha(self, rows, sr, rr):
        """statsmodels' exchangeable moment estimate from group sums ``sr`` and the total ``rr`` of squares
        of the Pearson residuals."""
        with np.errstate(all="ignore"):
            scale = rr / (self.n_obs[rows] - self.p)
            pairs = 0.5 * ((sr**2).sum(axis=1) - rr) / scale
            return pairs / (self.n_pairs[rows] - self.p)

    def run(self):
        """Fit every replicate; returns the mask of replicates statsmodels must settle (``bad``)."""
        self.start()
        R = self.y.shape[0]
        done = self.bad.copy()
        score_norm = np.full(R, np.inf)
        for itr in range(self.maxiter):
            idx = np.flatnonzero(~done)
            if idx.size == 0:
                break
            if idx.size == R:                    # every replicate: views instead of copies
                idx = slice(None)
            with np.errstate(all="ignore"):
                beta = self.beta[idx]
                # the correlation update statsmodels makes at the end of the previous iteration
                upd = self.update_dep[idx] if itr > 0 and self.exchangeable else None
                m = self.moments(idx, beta, self.alpha[idx], update=upd)
                step, ok = _solve_sym(m["B"], m["U"])
                norm = np.sqrt((m["U"] ** 2).sum(axis=1))
            k, a = self.k[idx], self.alpha[idx][:, None]
            # statsmodels' exchangeable solve divides by 1 - alpha and 1 + alpha (k - 1) (it goes on when
            # the correlation matrix is not positive definite, and so does this path): near 0, statsmodels decides
            near = (np.abs(1.0 - a) < 1e-8) | ((k > 1) & (np.abs(1.0 + a * (k - 1.0)) < 1e-8))
            wrong = ~ok | ~np.isfinite(norm) | near.any(axis=1)
            if self.family != "gaussian":   # exp() near overflow: statsmodels' warnings decide
                wrong |= np.abs(m["eta"]).max(axis=1) > 500
            self.beta[idx] = beta + step
            score_norm[idx] = norm
            stop = (norm < CTOL) & ((itr > 0) | ~self.update_dep[idx])
            rows = np.arange(R)[idx]
            self.bad[rows[wrong]] = True
            done[rows[stop | wrong]] = True
        self.bad |= ~(score_norm < CTOL)                # iteration limit: statsmodels warns
        return self.bad

    def estimate_and_cov(self, cov_type, skip):
        """Estimates (R, p) and the covariance (R, p, p) of ``cov_type`` at the final fit (NaN where ``skip``)."""
        R, N = self.y.shape
        p = self.p
        cov = np.full((R, p, p), np.nan)
        todo = np.flatnonzero(~skip)
        step = max(1, BLOCK_VALUES // max(N * p * p, 1))
        with np.errstate(all="ignore"):
            for s in range(0, todo.size, step):
                rows = todo[s:s + step]
                m = self.moments(rows, self.beta[rows], self.alpha[rows], per_group=True)
                cov[rows] = _sandwich(cov_type, m["B"], m["M"], m["u"])
        est = np.where(skip[:, None], np.nan, self.beta)
        return est, cov


def _well_posed(A):
    """(..., p, p) symmetric matrices: finite and positive definite beyond rounding (min eig > RCOND max eig)."""
    finite = np.isfinite(A).all(axis=(-1, -2))
    ev = np.linalg.eigvalsh(np.where(finite[..., None, None], A, np.eye(A.shape[-1])))
    return finite & (ev[..., 0] > RCOND * np.abs(ev[..., -1]))


def _solve_sym(A, b):
    """Solve ``A x = b`` for a stack of symmetric ``A``; rows that are not well posed get x from I (and ok False)."""
    ok = _well_posed(A)
    A = np.where(ok[..., None, None], A, np.eye(A.shape[-1]))
    return np.linalg.solve(A, b[..., None])[..., 0], ok


def _sandwich(cov_type, B, M, u):
    """The covariance of ``cov_type`` from ``B`` (r, p, p), per-group ``M_i`` (r, G, p, p) and ``u_i`` (r, G, p)."""
    ok = _well_posed(B)
    B = np.where(ok[:, None, None], B, np.eye(B.shape[-1]))
    nan = np.where(ok, 1.0, np.nan)[:, None, None]               # not well posed: NaN, statsmodels decides
    Binv = np.linalg.inv(B)
    if cov_type in ("bias_reduced", "mancl_derouen"):
        # D_i' V_i^-1 (I - H_i)^-1 r_i = B (B - M_i)^-1 u_i (Woodbury), so the covariance is
        # sum_i (B - M_i)^-1 u_i u_i' (B - M_i)^-1
        t, ok_i = _solve_sym(B[:, None] - M, u)
        t = np.where(ok_i[..., None], t, np.nan)
        return np.einsum("rgp,rgq->rpq", t, t) * nan
    if cov_type == "kauermann_carroll":
        # with B = C C' and K_i = C^-1 M_i C^-T = Q diag(lam) Q': D_i' V_i^-1 (I - H_i)^-1/2 r_i
        # = u_i + M_i C^-T Q diag(f(lam)) Q' C^-1 u_i, f(lam) = ((1 - lam)^-1/2 - 1) / lam
        C = np.linalg.cholesky(B)
        Ci = np.linalg.inv(C)[:, None]                          # (r, 1, p, p)
        K = Ci @ M @ np.swapaxes(Ci, -1, -2)
        lam, Q = np.linalg.eigh(K)
        s = np.sqrt(1.0 - lam)
        f = 1.0 / (s * (1.0 + s))                               # the same, without cancellation at lam = 0
        v = np.swapaxes(Q, -1, -2) @ (Ci @ u[..., None])
        adj = M @ (np.swapaxes(Ci, -1, -2) @ (Q @ (f[..., None] * v)))
        u = u + adj[..., 0]
    meat = np.einsum("rgp,rgq->rpq", u, u)
    return Binv @ meat @ Binv * nan

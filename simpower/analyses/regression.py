"""Linear regression of the outcome on arm and covariates (OLS, ANCOVA).

The per-replicate path fits ``statsmodels.formula.api.ols`` and reads one
coefficient (``term``). Formulas are checked at construction against the one
grammar of :mod:`simpower.formula` before statsmodels sees them, because a
formula engine evaluates the text as Python: column names, ``C(column)``,
interactions ``a:b`` and ``a*b``, parentheses, ``0``/``1`` and ``- term``;
nothing else is accepted, so a scenario file cannot run code through it.

The batch path (main-effects formulas with an intercept, categorical columns
shared by all replicates; ``cov_type`` 'nonrobust' or 'HC0'-'HC3') solves the
normal equations of every replicate at once with numpy on stacked (R, p, p)
matrices, and agrees with statsmodels to about 1e-10. With missing outcomes
(a process with a missingness mechanism, padded or not) it weights the rows by
the observed mask W (X'WX, X'Wy: complete cases, as the per-replicate
``dropna``), with per-replicate residual df, and also covers ``cov_type =
'cluster'`` (CR1 with G - 1 df, G the clusters with an observed row, as
statsmodels); a replicate where a level of a categorical column has no observed
row, or with no residual df, goes to the per-replicate path.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import stats

from .._validation import Anything, Bool, Choice, Real
from ..errors import ParameterError, nearest
from ..formula import Formula, FormulaText, parse_formula  # noqa: F401  (parse_formula: public here too)
from .base import ALTERNATIVE, CI_LEVEL, Analysis, BatchResult, TestResult, hand_over
from .numeric import p_from_t, p_from_z

COV_TYPES = ("nonrobust", "HC0", "HC1", "HC2", "HC3", "cluster")


@dataclass(frozen=True)
class Text(Anything):
    optional: bool = True

    def describe(self) -> str:
        return "a coefficient name such as \"C(arm)[T.1]\""

    def clean(self, name, value):
        if value is None and self.optional:
            return None
        if not isinstance(value, str) or not value:
            raise ParameterError(f"`{name}` must be {self.describe()}; got {value!r}.")
        return value


def _default_term(f: Formula) -> str | None:
    for term in f.terms:
        if term == (("cat", "arm"),):
            return "C(arm)[T.1]"
    for term in f.terms:
        if term == (("num", "arm"),):
            return "arm"
    return None


def _level(v) -> str:
    return str(v.item() if hasattr(v, "item") else v)


class OLS(Analysis):
    """Ordinary least squares fit of ``formula``; tests one coefficient.

    H0: the coefficient ``term`` (default: arm 1 vs arm 0) equals
    ``null_value``, against ``alternative``.

    Parameters
    ----------
    formula : str, default "y ~ C(arm)"
        See the module notes for the accepted grammar. "y ~ C(arm) + baseline"
        is ANCOVA (also available as the ``ancova`` analysis).
    term : str, optional
        Coefficient to test, as statsmodels names it ("C(arm)[T.1]",
        "baseline", ...); default "C(arm)[T.1]" (or "arm" when arm enters as a
        number).
    cov_type : {'nonrobust', 'HC0', 'HC1', 'HC2', 'HC3', 'cluster'}, default 'nonrobust'
        Classical, heteroscedasticity-consistent (MacKinnon & White 1985,
        J Econometrics 29:305-325) or cluster-robust SEs; 'cluster' groups by
        the ``cluster`` column (t with G - 1 df under ``use_t``, as statsmodels).
    use_t : bool, default True
        t (residual df) rather than normal reference distribution, also for
        robust SEs.
    alternative : {'two-sided', 'greater', 'less'}
    ci_level : float in (0, 1), default 0.95
    null_value : float, default 0

    Rows with a missing value in any formula column (or ``cluster``) are dropped.
    """

    name = "ols"
    null_hypothesis = "the coefficient `term` (arm 1 vs arm 0 by default) equals null_value"
    params = {"formula": FormulaText(), "term": Text(), "cov_type": Choice(COV_TYPES), "use_t": Bool(),
              "alternative": ALTERNATIVE, "ci_level": CI_LEVEL, "null_value": Real()}
    defaults = {"formula": "y ~ C(arm)", "term": None, "cov_type": "nonrobust", "use_t": True,
                "alternative": "two-sided", "ci_level": 0.95, "null_value": 0.0}

    def _check(self):
        if self.term is None and _default_term(self.parsed) is None:
            raise ParameterError(f"`term` is required: formula {self.formula!r} has no arm term; "
                                 "name the coefficient to test.")

    @property
    def estimand_label(self) -> str | None:
        """None (the process's mean difference, adjusted) for an arm coefficient, else its name."""
        term = self.coefficient
        return None if term == "arm" or term.startswith("C(arm)[") else f"coefficient {term}"

    @property
    def parsed(self) -> Formula:
        return parse_formula(self.formula)

    @property
    def coefficient(self) -> str:
        return self.term or _default_term(self.parsed)

    # -- per replicate ---------------------------------------------------------
    def __call__(self, data):
        import pandas as pd
        from statsmodels.regression import linear_model  # smf.ols is linear_model.OLS.from_formula

        f = self.parsed
        cols = f.columns + (["cluster"] if self.cov_type == "cluster" else [])
        missing = [c for c in cols if c not in data]
        if missing:
            raise ValueError(f"ols: column {missing[0]!r} of the formula is not in the data "
                             f"(columns: {sorted(data)})")
        frame = pd.DataFrame({c: np.asarray(data[c]) for c in cols}).dropna()
        kw = {"cov_type": self.cov_type, "use_t": self.use_t}
        if self.cov_type == "cluster":
            kw["cov_kwds"] = {"groups": frame["cluster"].to_numpy()}
        fit = linear_model.OLS.from_formula(self.formula, frame).fit(**kw)
        term = self.coefficient
        if term not in fit.params.index:
            raise ValueError(f"ols: no coefficient {term!r}; coefficients: {list(fit.params.index)}."
                             + nearest(term, list(fit.params.index)))
        est, se = float(fit.params[term]), float(fit.bse[term])
        df = float(getattr(fit, "df_resid_inference", None) or fit.df_resid)
        return TestResult(**{k: float(v) for k, v in self._inference(est, se, df).items()}, df=df)

    def _inference(self, est, se, df):
        with np.errstate(divide="ignore", invalid="ignore"):
            t = (est - self.null_value) / se
        if self.use_t:
            p = p_from_t(t, df, self.alternative)
            crit = stats.t.ppf(0.5 + self.ci_level / 2, df)
        else:
            p = p_from_z(t, self.alternative)
            crit = stats.norm.ppf(0.5 + self.ci_level / 2)
        return {"pvalue": p, "estimate": est, "se": se, "ci_low": est - crit * se, "ci_high": est + crit * se,
                "statistic": t}

    # -- batch -------------------------------------------------------------------
    layouts = ("table",)  # any complete table with the formula's columns (checked below)

    def supports_batch(self, batch):
        f = self.parsed
        if not f.intercept or not f.main_effects_only or f.references:
            return False
        if batch.missing:  # missing outcomes (padded or not): the masked path
            if self.cov_type == "cluster" and "cluster" not in batch:
                return False
        elif self.cov_type == "cluster" or batch.present is not None:
            return False
        for term in f.terms:
            kind, col = term[0]
            if kind == "cat" and col not in batch.shared and not batch.missing:
                return False
            if col not in batch:
                return False
        if f.outcome not in batch:
            return False
        try:
            names = self._design(batch)[1]
        except Exception:
            return False
        return self.coefficient in names

    def _design(self, batch, present=None):
        """Design (N, p) shared or (R, N, p) per replicate, and its column names.

        ``present`` (R, N): the levels of a categorical column are those of these rows only.
        """
        f = self.parsed
        cols, names = [], []
        n = np.shape(batch[f.outcome])[-1]
        if f.intercept:
            cols.append(np.ones(n))
            names.append("Intercept")
        for ((kind, col),) in f.terms:
            v = np.asarray(batch[col])
            if kind == "cat":
                levels = np.unique(v[present] if present is not None and v.ndim == 2 else v)
                for lev in levels[1:]:
                    cols.append((v == lev).astype(float))
                    names.append(f"C({col})[T.{_level(lev)}]")
            else:
                cols.append(v.astype(float))
                names.append(col)
        if all(c.ndim == 1 for c in cols):
            return np.stack(cols, axis=-1), names
        stacked = [np.broadcast_to(c, (batch.size, n)) for c in cols]
        return np.stack(stacked, axis=-1), names

    def batch(self, batch):
        if batch.missing:
            return self._masked(batch)
        f = self.parsed
        x, names = self._design(batch)
        y = np.asarray(batch[f.outcome], float)
        y = np.broadcast_to(y, (batch.size, y.shape[-1]))
        k = names.index(self.coefficient)
        n, p = y.shape[1], len(names)
        xb = np.broadcast_to(x, (batch.size, n, p))
        with np.errstate(all="ignore"):
            a = np.einsum("rni,rnj->rij", xb, xb)
            try:
                ainv = np.linalg.inv(a)
            except np.linalg.LinAlgError:  # a singular design in some replicate: statsmodels uses pinv too
                ainv = np.linalg.pinv(a)
            beta = np.einsum("rij,rnj,rn->ri", ainv, xb, y)
            e = y - np.einsum("rnj,rj->rn", xb, beta)
            df = float(n - p)
            if self.cov_type == "nonrobust":
                var = np.einsum("rn,rn->r", e, e) / df * ainv[:, k, k]
            else:
                w = np.einsum("rnj,rjk->rnk", xb, ainv)     # rows of X (X'X)^-1
                c = w[:, :, k]
                e2 = e * e
                if self.cov_type in ("HC2", "HC3"):
                    h = np.einsum("rnj,rnj->rn", w, xb)    # leverages
                    e2 = e2 / (1.0 - h) ** (1 if self.cov_type == "HC2" else 2)
                var = np.einsum("rn,rn->r", c * c, e2)
                if self.cov_type == "HC1":
                    var = var * n / df
            out = self._inference(beta[:, k], np.sqrt(var), df)
        out.pop("statistic")
        return BatchResult(**out)

    def _masked(self, batch):
        """Complete cases under the observed mask W: X'WX, X'Wy, residual df n_obs - p per replicate."""
        f = self.parsed
        x, names = self._design(batch, batch.present)
        y = np.asarray(batch[f.outcome], float)
        r, n, p = batch.size, y.shape[-1], len(names)
        y = np.broadcast_to(y, (r, n))
        xb = np.broadcast_to(x, (r, n, p))
        w = np.isfinite(y)                                   # dropna over the formula's columns
        for col in f.columns[1:] + (["cluster"] if self.cov_type == "cluster" else []):
            v = np.asarray(batch[col])
            if np.issubdtype(v.dtype, np.floating):
                w = w & np.isfinite(v)
        if batch.present is not None:
            w = w & batch.present
        n_obs = np.count_nonzero(w, axis=1)
        # replicates with a categorical level (reference included) without an observed row: statsmodels
        # then has other coefficients; with no residual df: no SE; both per replicate
        few = n_obs <= p
        for ((kind, col),) in f.terms:
            if kind == "cat":
                v = np.asarray(batch[col])
                for lev in np.unique(v[w] if v.ndim == 2 else v):
                    few |= ~np.any(w & (v == lev), axis=1)
        k = names.index(self.coefficient)
        with np.errstate(all="ignore"):
            xw = np.where(w[:, :, None], xb, 0.0)
            yw = np.where(w, y, 0.0)
            a = np.einsum("rni,rnj->rij", xw, xw)
            a[few] = np.eye(p)                               # handed over below; keeps inv() defined
            try:
                ainv = np.linalg.inv(a)
            except np.linalg.LinAlgError:
                ainv = np.linalg.pinv(a)
            beta = np.einsum("rij,rnj,rn->ri", ainv, xw, yw)
            e = yw - np.einsum("rnj,rj->rn", xw, beta)       # 0 on rows not observed
            df = (n_obs - p).astype(float)
            if self.cov_type == "nonrobust":
                var = np.einsum("rn,rn->r", e, e) / df * ainv[:, k, k]
            else:
                wx = np.einsum("rnj,rjk->rnk", xw, ainv)    # rows of X (X'WX)^-1
                c = wx[:, :, k]
                if self.cov_type == "cluster":
                    var, g = self._cluster_var(batch, c * e, w, n_obs, p)
                    df = (g - 1).astype(float)
                    few = few | (g < 2)
                else:
                    e2 = e * e
                    if self.cov_type in ("HC2", "HC3"):
                        h = np.einsum("rnj,rnj->rn", wx, xw)   # leverages (0 on rows not observed)
                        e2 = e2 / (1.0 - h) ** (1 if self.cov_type == "HC2" else 2)
                        # a leverage of 1 (a level observed once): 0/0 up to rounding, per replicate
                        few = few | np.any(h > 1.0 - 1e-8, axis=1)
                    var = np.einsum("rn,rn->r", c * c, e2)
                    if self.cov_type == "HC1":
                        var = var * n_obs / df
            out = self._inference(beta[:, k], np.sqrt(var), df)
        out.pop("statistic")
        return hand_over(self, batch, BatchResult(**out), few)

    @staticmethod
    def _cluster_var(batch, score, w, n_obs, p):
        """Cluster-robust variance of one coefficient from its per-row scores, and G (R,).

        statsmodels' 'cluster' covariance with its default small-sample correction (CR1):
        G / (G - 1) * (N - 1) / (N - p) * sum over clusters of the squared score sums, G the
        clusters with an observed row.
        """
        r, n = score.shape
        cl = np.broadcast_to(np.asarray(batch["cluster"]), (r, n))
        labels, codes = np.unique(cl, return_inverse=True)
        g_all = labels.size
        idx = codes.reshape(r, n) + g_all * np.arange(r)[:, None]
        sums = np.bincount(idx[w], weights=score[w], minlength=r * g_all).reshape(r, g_all)
        g = np.count_nonzero(np.bincount(idx[w], minlength=r * g_all).reshape(r, g_all), axis=1)
        var = (g / (g - 1.0)) * ((n_obs - 1.0) / (n_obs - p)) * np.einsum("rg,rg->r", sums, sums)
        return var, g


class Ancova(OLS):
    """ANCOVA: OLS of the outcome on arm and the baseline covariate.

    Same as :class:`OLS` with ``formula = "y ~ C(arm) + baseline"`` by
    default. H0: the baseline-adjusted arm 1 vs arm 0 difference equals
    ``null_value``.
    """

    name = "ancova"
    null_hypothesis = "the baseline-adjusted mean difference (arm 1 vs arm 0) equals null_value"
    defaults = {**OLS.defaults, "formula": "y ~ C(arm) + baseline"}

"""Linear regression of the outcome on arm and covariates (OLS, ANCOVA).

The per-replicate path fits ``statsmodels.formula.api.ols`` and reads one
coefficient (``term``). Formulas are checked at construction against the one
grammar of :mod:`simpower.formula` before statsmodels sees them, because a
formula engine evaluates the text as Python: column names, ``C(column)``,
interactions ``a:b`` and ``a*b``, parentheses, ``0``/``1`` and ``- term``;
nothing else is accepted, so a scenario file cannot run code through it.

The batch path (main-effects formulas with an intercept, categorical columns
shared by all replicates unless rows are masked; every ``cov_type``) solves the
normal equations of every replicate at once, column by column: the columns
shared by the replicates (intercept, dummies of a shared factor) as one (N, s)
block whose products across replicates are sums along its runs of equal rows,
the per-replicate columns (covariates) as (R, N) arrays, and (R, p, p) inverses;
no (R, N, p) design array. It agrees with statsmodels to about 1e-12. With
missing outcomes or padding it weights the rows by the observed mask W (X'WX,
X'Wy: complete cases, as the per-replicate ``dropna``), with per-replicate
residual df; ``cov_type = 'cluster'`` is CR1 with G - 1 df, G the clusters
with an observed row, as statsmodels. A replicate where a level of a
categorical column has no observed row, with no residual df, or (HC2/HC3) a
row of leverage 1 goes to the per-replicate path.

The per-replicate path of a main-effects formula over numeric columns builds
the design by hand (the formula engine's columns, order and memory order) and
calls statsmodels ``OLS`` on arrays: the same fit, bit for bit, without the
formula engine's cost (about 50 ms a call).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .._validation import Anything, Bool, Choice, Real
from ..errors import ParameterError, nearest
from ..formula import Formula, FormulaText, parse_formula  # noqa: F401  (parse_formula: public here too)
from .base import ALTERNATIVE, CI_LEVEL, Analysis, BatchResult, TestResult, hand_over
from .numeric import normal_ppf, p_from_t, p_from_z, t_ppf

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


def _dot(u, v):
    """Row-wise sums of ``u * v`` over the last axis: (R,) (or a scalar when both are shared (N,) columns)."""
    u = u[0] if u.ndim == 2 and u.shape[0] == 1 else u
    v = v[0] if v.ndim == 2 and v.shape[0] == 1 else v
    if u.ndim == 1 and v.ndim == 1:
        return u @ v
    if v.ndim == 1:
        return u @ v
    if u.ndim == 1:
        return v @ u
    return np.einsum("rn,rn->r", u, v)


class _Rows:
    """The distinct rows of a shared design block XS (N, s), for products ``coef @ XS.T`` across replicates.

    A design of an intercept and factor dummies has a handful of distinct rows, usually in runs
    (the arms' blocks): ``expand`` evaluates the (R, s) coefficients on the distinct rows and
    repeats them along the runs, one pass over the (R, N) result instead of a matrix product with
    an inner dimension of s (slow in BLAS for s = 2 or 3 and many threads).
    """

    def __init__(self, xs):
        self.xs = xs
        s = xs.shape[1]
        iu = np.triu_indices(s)
        self.pat, inv = np.unique(xs, axis=0, return_inverse=True)
        inv = inv.reshape(-1)
        self.pat_pairs = self.pat[:, iu[0]] * self.pat[:, iu[1]]
        starts = np.flatnonzero(np.r_[True, inv[1:] != inv[:-1]])
        self.run_pat = inv[starts]
        self.run_len = np.diff(np.r_[starts, inv.size])
        self.inv = inv
        self.starts = starts
        self.pairs = xs[:, iu[0]] * xs[:, iu[1]]

    def sums(self, v, pairs=False):
        """``v @ XS`` (``pairs``: ``v @`` the column pairs) for ``v`` (R, N): sums along the runs, then
        the runs' rows (a matrix product for many runs)."""
        table = self.pairs if pairs else self.xs
        if self.run_len.size > 64:
            return v @ table
        return np.einsum("rk,ks->rs", np.add.reduceat(v, self.starts, axis=1), table[self.starts])

    def expand(self, coef, pairs=False):
        """(R, N) rows of ``coef`` (R, s) times XS' (``pairs``: (R, s(s+1)/2) times the column pairs')."""
        pat = self.pat_pairs if pairs else self.pat
        g = np.einsum("rs,ps->rp", coef, pat)
        if self.run_len.size <= 64:
            return np.repeat(g[:, self.run_pat], self.run_len, axis=1)
        return np.take(g, self.inv, axis=1)


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
        kw = {"cov_type": self.cov_type, "use_t": self.use_t}
        term = self.coefficient
        lean = self._lean(data, cols)
        if lean is not None:   # main effects of numeric columns: the design by hand, as the formula builds it
            x, y, names, groups = lean
            if self.cov_type == "cluster":
                kw["cov_kwds"] = {"groups": groups}
            if term not in names:
                raise ValueError(f"ols: no coefficient {term!r}; coefficients: {names}." + nearest(term, names))
            fit = linear_model.OLS(y, x).fit(**kw)
            k = names.index(term)
            est, se = float(fit.params[k]), float(fit.bse[k])
        else:
            frame = pd.DataFrame({c: np.asarray(data[c]) for c in cols}).dropna()
            if self.cov_type == "cluster":
                kw["cov_kwds"] = {"groups": frame["cluster"].to_numpy()}
            fit = linear_model.OLS.from_formula(self.formula, frame).fit(**kw)
            if term not in fit.params.index:
                raise ValueError(f"ols: no coefficient {term!r}; coefficients: {list(fit.params.index)}."
                                 + nearest(term, list(fit.params.index)))
            est, se = float(fit.params[term]), float(fit.bse[term])
        df = float(getattr(fit, "df_resid_inference", None) or fit.df_resid)
        return TestResult(**{k: float(v) for k, v in self._inference(est, se, df).items()}, df=df)

    def _lean(self, data, cols):
        """(X, y, column names, cluster ids) of the complete rows, or None to let the formula engine build them.

        For main-effects formulas with an intercept over numeric (or boolean) columns: the columns
        the formula engine builds (intercept, treatment dummies of each ``C(column)`` against its
        lowest level, numeric columns as they are, in the formula's order), with the rows dropped
        where a float column is NaN (``DataFrame.dropna``), without building a data frame.
        """
        f = self.parsed
        if not f.intercept or not f.main_effects_only or f.references:
            return None
        arrays = {c: np.asarray(data[c]) for c in cols}
        if any(v.ndim != 1 or v.dtype.kind not in "biuf" for v in arrays.values()):
            return None
        keep = None
        for v in arrays.values():
            if v.dtype.kind == "f":
                bad = np.isnan(v)
                keep = ~bad if keep is None else keep & ~bad
        if keep is not None and not keep.all():
            arrays = {c: v[keep] for c, v in arrays.items()}
        if arrays[f.outcome].size == 0:
            return None
        cols_, names = self._columns(arrays)
        # column-major, as the formula engine hands it over (the fit's last bits depend on the memory order)
        return (np.stack(cols_).T, np.asarray(arrays[f.outcome], float), names,
                arrays.get("cluster"))

    def _inference(self, est, se, df):
        with np.errstate(divide="ignore", invalid="ignore"):
            t = (est - self.null_value) / se
        if self.use_t:
            p = p_from_t(t, df, self.alternative)
            if np.ndim(df):   # few distinct df across replicates: the quantile once for each
                u, inv = np.unique(df, return_inverse=True)
                crit = t_ppf(0.5 + self.ci_level / 2, u)[inv.reshape(np.shape(df))]
            else:
                crit = t_ppf(0.5 + self.ci_level / 2, df)
        else:
            p = p_from_z(t, self.alternative)
            crit = normal_ppf(0.5 + self.ci_level / 2)
        return {"pvalue": p, "estimate": est, "se": se, "ci_low": est - crit * se, "ci_high": est + crit * se,
                "statistic": t}

    # -- batch -------------------------------------------------------------------
    layouts = ("table",)  # any complete table with the formula's columns (checked below)

    def supports_batch(self, batch):
        f = self.parsed
        if not f.intercept or not f.main_effects_only or f.references:
            return False
        if self.cov_type == "cluster" and "cluster" not in batch:
            return False
        masked = batch.missing or batch.present is not None
        for term in f.terms:
            kind, col = term[0]
            if col not in batch:
                return False
            if kind == "cat" and col not in batch.shared and not masked:
                return False
        if f.outcome not in batch:
            return False
        try:
            names = self._columns(batch, batch.present)[1]
        except Exception:
            return False
        return self.coefficient in names

    def _columns(self, batch, present=None):
        """The design's columns, each (N,) shared by the replicates or (R, N), and their names.

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
                cols.append(np.asarray(v, float))
                names.append(col)
        return cols, names

    def batch(self, batch):
        """Normal equations of every replicate at once, without an (R, N, p) design array.

        Complete data without padding: X'X and X'y; otherwise the observed mask W (missing outcome
        or covariate, padding): X'WX, X'Wy and per-replicate residual df (complete cases, as the
        per-replicate ``dropna``). The columns shared by all replicates (intercept, dummies of a
        shared factor) enter as one (N, s) matrix, so their sums are matrix products across the
        replicates; the per-replicate columns (covariates) as (R, N) arrays. A replicate where a
        level of a categorical column has no observed row, with no residual df or (HC2/HC3) a
        leverage of 1 goes to the per-replicate path.
        """
        f = self.parsed
        masked = batch.missing or batch.present is not None
        cols, names = self._columns(batch, batch.present if masked else None)
        y = np.asarray(batch[f.outcome], float)
        r, n, p = batch.size, y.shape[-1], len(names)
        y = np.broadcast_to(y, (r, n))
        k = names.index(self.coefficient)
        cluster = self.cov_type == "cluster"
        if masked:
            w = np.isfinite(y)                                   # dropna over the formula's columns
            for col in f.columns[1:] + (["cluster"] if cluster else []):
                v = np.asarray(batch[col])
                if np.issubdtype(v.dtype, np.floating):
                    w = w & np.isfinite(v)
            if batch.present is not None:
                w = w & batch.present
            n_obs = np.count_nonzero(w, axis=1)
            wf = w.astype(float)
            yw = np.where(w, y, 0.0)
        else:
            w = wf = None
            n_obs = np.full(r, n)
            yw = y
        few = n_obs <= p
        for ((kind, col),) in f.terms:   # a level (reference included) without an observed row: per replicate
            if kind == "cat" and masked:
                v = np.asarray(batch[col])
                if v.ndim == 1:
                    few |= np.any((wf @ (v[:, None] == np.unique(v)).astype(float)) == 0, axis=1)
                else:
                    for lev in np.unique(v[w]):
                        few |= ~np.any(w & (v == lev), axis=1)
        si = [i for i, c in enumerate(cols) if c.ndim == 1]       # shared columns: XS (N, s)
        pi = [i for i, c in enumerate(cols) if c.ndim == 2]       # per-replicate columns, 0 where W is
        xs = np.stack([cols[i] for i in si], axis=1)
        rows = _Rows(xs)
        xp = [np.broadcast_to(np.where(w, cols[i], 0.0) if masked else cols[i], (r, n)) for i in pi]
        s = len(si)
        iu = np.triu_indices(s)
        with np.errstate(all="ignore"):
            a = np.empty((r if masked or pi else 1, p, p))
            ss = rows.sums(wf, pairs=True) if masked else rows.pairs.sum(axis=0)[None, :]
            a[:, [si[i] for i in iu[0]], [si[j] for j in iu[1]]] = ss
            a[:, [si[j] for j in iu[1]], [si[i] for i in iu[0]]] = ss
            for jj, j in enumerate(pi):
                sp_ = rows.sums(xp[jj])                               # (R, s); W^2 = W
                a[:, si, j] = a[:, j, si] = sp_
                for ll in range(jj, len(pi)):
                    a[:, j, pi[ll]] = a[:, pi[ll], j] = np.einsum("rn,rn->r", xp[jj], xp[ll])
            if few.any():
                a = np.array(np.broadcast_to(a, (r, p, p)))
                a[few] = np.eye(p)                               # handed over below; keeps inv() defined
            try:
                ainv = np.linalg.inv(a)
            except np.linalg.LinAlgError:  # a singular design in some replicate: statsmodels uses pinv too
                ainv = np.linalg.pinv(a)
            xty = np.empty((r, p))
            xty[:, si] = rows.sums(yw)
            for jj, j in enumerate(pi):
                xty[:, j] = np.einsum("rn,rn->r", xp[jj], yw)
            beta = np.einsum("rij,rj->ri", ainv, xty) if ainv.shape[0] == r else xty @ ainv[0].T
            fitted = rows.expand(beta[:, si])
            for jj, j in enumerate(pi):
                fitted += beta[:, j, None] * xp[jj]
            e = np.subtract(yw, fitted, out=fitted)
            if masked:
                e *= wf                                          # 0 on rows not observed
            df = (n_obs - p).astype(float)
            if self.cov_type == "nonrobust":
                var = np.einsum("rn,rn->r", e, e) / df * ainv[:, k, k]
            else:
                def row(i):   # row i of (X'WX)^-1 X' (W applied by the caller), (R, N) or (1, N)
                    out = rows.expand(ainv[:, i, si])
                    for jj, j in enumerate(pi):
                        out = out + ainv[:, i, j, None] * xp[jj]
                    return out

                c = row(k)                                       # its products with e vanish off W
                if cluster:
                    var, g = self._cluster_var(batch, c * e, wf, n_obs, p)
                    df = (g - 1).astype(float)
                    few = few | (g < 2)
                else:
                    e2 = e * e
                    if self.cov_type in ("HC2", "HC3"):
                        # leverages x'(X'WX)^-1 x: shared part as one product with the column pairs
                        coef = ainv[:, [si[i] for i in iu[0]], [si[j] for j in iu[1]]] * np.where(iu[0] == iu[1], 1.0, 2.0)
                        h = rows.expand(coef, pairs=True)
                        for jj, j in enumerate(pi):
                            h = h + xp[jj] * rows.expand(2.0 * ainv[:, j, si])
                            for ll in range(jj, len(pi)):
                                h = h + (1.0 if ll == jj else 2.0) * ainv[:, j, pi[ll], None] * xp[jj] * xp[ll]
                        if masked:
                            h = h * wf
                        e2 = e2 / (1.0 - h) ** (1 if self.cov_type == "HC2" else 2)
                        # a leverage of 1 (a level observed once): 0/0 up to rounding, per replicate
                        few = few | np.any(h > 1.0 - 1e-8, axis=-1)
                    var = np.einsum("rn,rn->r", e2, np.broadcast_to(c * c, (r, n)))
                    if self.cov_type == "HC1":
                        var = var * n_obs / df
            out = self._inference(beta[:, k], np.sqrt(var), df)
        out.pop("statistic")
        res = BatchResult(**out)
        return hand_over(self, batch, res, few) if few.any() else res

    @staticmethod
    def _cluster_var(batch, score, wf, n_obs, p):
        """Cluster-robust variance of one coefficient from its per-row scores (0 on unobserved rows), and G (R,).

        statsmodels' 'cluster' covariance with its default small-sample correction (CR1):
        G / (G - 1) * (N - 1) / (N - p) * sum over clusters of the squared score sums, G the
        clusters with an observed row (``wf``, the observed mask as 0/1 floats; None: every row observed).
        """
        r, n = score.shape
        cl = np.asarray(batch["cluster"])
        if cl.ndim == 1:                                   # shared cluster ids: sums along runs of one cluster
            codes = np.unique(cl, return_inverse=True)[1].reshape(-1)
            order = None if np.all(codes[1:] >= codes[:-1]) else np.argsort(codes, kind="stable")
            if order is not None:
                codes, score = codes[order], score[:, order]
                wf = None if wf is None else wf[:, order]
            starts = np.flatnonzero(np.r_[True, codes[1:] != codes[:-1]])
            sums = np.add.reduceat(score, starts, axis=1)
            counts = (np.add.reduceat(wf, starts, axis=1) if wf is not None
                      else np.broadcast_to(np.diff(np.r_[starts, n]), (r, starts.size)))
        else:
            cl = np.broadcast_to(cl, (r, n))
            labels, codes = np.unique(cl, return_inverse=True)
            g_all = labels.size
            idx = codes.reshape(r, n) + g_all * np.arange(r)[:, None]
            ww = np.ones((r, n)) if wf is None else np.broadcast_to(wf, (r, n))
            sums = np.bincount(idx.ravel(), weights=score.ravel(), minlength=r * g_all).reshape(r, g_all)
            counts = np.bincount(idx.ravel(), weights=ww.ravel(), minlength=r * g_all).reshape(r, g_all)
        g = np.count_nonzero(counts > 0, axis=1)
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
